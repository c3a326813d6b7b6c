"""A sweep from a script or batch job: no notebook, no widgets.

Runs a small grid on the demo load data, keeps every finished run in a SQLite
file (run the script again and it resumes instead of starting over), prints
the ranked summary and exports the winner.

    python examples/headless_sweep.py [OUT_DIR]
"""
import sys
from pathlib import Path

import rnnkit

out = Path(sys.argv[1] if len(sys.argv) > 1 else "headless-out")
out.mkdir(parents=True, exist_ok=True)

# Ten weeks of the invented warehouse's hourly load keep this example quick.
df = rnnkit.datasets.cold_storage_load(years=70 / 365)
base = rnnkit.Config(target="load_kw", missing="interpolate", horizon=1,
                     hidden=16, epochs=4, batch_size=64)
space = {"window": [12, 24], "activation": ["tanh", "relu"]}

result = rnnkit.sweep(df, base, space, seeds=2, store=str(out / "runs.db"), progress=False)
print(result.summary().to_string())
result.export(out / "best-config.json")

best = rnnkit.load_config(out / "best-config.json")
print("winner:", {k: getattr(best, k) for k in space})
