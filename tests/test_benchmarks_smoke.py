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


def test_results_say_shared_only_on_signs_of_other_work():
    # The suite keeps both cores busy itself (load near 2 while it runs): that alone must
    # not be reported as other work; a loaded machine before the start or a busy process must.
    import copy
    import json
    sys.path.insert(0, str(ROOT / "benchmarks"))
    try:
        from _report_md import render
    finally:
        sys.path.remove(str(ROOT / "benchmarks"))
    summary = json.loads((ROOT / "benchmarks" / "RESULTS.json").read_text())
    quiet = copy.deepcopy(summary)
    quiet.update(load_before=[0.15, 0.03, 0.01], busy_before=[],
                 load_during={"min": 0.15, "mean": 1.9, "max": 2.0})
    assert "Other work was running" not in render(quiet)
    for change in ({"load_before": [1.8, 1.2, 1.0]}, {"busy_before": ["python (pid 7)"]},
                   {"load_during": {"min": 1.0, "mean": 2.5, "max": 3.4}}):
        assert "Other work was running" in render({**quiet, **change}), change
