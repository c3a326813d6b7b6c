"""The benchmark suite runs end to end in its tiny --smoke mode and reports every target.

No timing is asserted here (speed targets live in benchmarks/, measured by
``python benchmarks/run.py``); this only proves that each script runs, prints
its target lines in the agreed format and that run.py writes its results file.
"""
import re
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
TARGET = re.compile(r"^TARGET (\S+): .+ \(target .+\) (PASS|MISS)$", re.MULTILINE)
OURS = ("sweep.training_programs", "sweep.compile_share", "sweep.speedup_2_workers",
        "latency.warm_fit", "latency.cold_fit", "memory.prepare_and_train_peak_rss",
        "first_result.fit_fresh_process_filled_cache", "first_result.train_to_last_figure_filled_cache",
        "forecast.warm_24_steps", "forecast.warm_24_steps_future_inputs")


@pytest.mark.timeout(1200)
def test_run_py_smoke_reports_every_target(tmp_path):
    out = tmp_path / "RESULTS.md"
    proc = subprocess.run([sys.executable, str(ROOT / "benchmarks" / "run.py"), "--smoke", "--out", str(out)],
                          capture_output=True, text=True, cwd=tmp_path, timeout=1150)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-3000:]
    names = [m.group(1) for m in TARGET.finditer(proc.stdout)]
    for name in OURS:
        assert names.count(name) == 1, f"{name} reported {names.count(name)} times:\n{proc.stdout}"
    assert "failed" not in proc.stdout.split("wrote")[0], proc.stdout
    text = out.read_text()
    for heading in ("## Targets", "## Sweep", "## Latency", "## Memory", "## Training step",
                    "## Time to first result", "## Forecast"):
        assert heading in text
    for name in OURS:
        assert f"| {name} |" in text
    assert "jax " in text and "torch " in text and "numpy " in text  # versions recorded
    assert not list(tmp_path.glob(".RESULTS.*"))  # atomic writes left no temp file behind
    # the saved numbers rebuild the same Markdown
    again = tmp_path / "again.md"
    subprocess.run([sys.executable, str(ROOT / "benchmarks" / "run.py"), "--render",
                    str(out.with_suffix(".json")), "--out", str(again)], check=True, timeout=120,
                   capture_output=True)
    assert again.read_text() == text
