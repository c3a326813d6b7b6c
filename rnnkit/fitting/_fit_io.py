"""Save a FitResult to a folder and read it back.

The folder (our own small layout):

    config.json       format "rnnkit-fit", version; the Config; the outcome
                      (status, best epoch, ...); what predict needs for a new
                      frame: input and target names, class labels, the fitted
                      scaler's statistics, window, horizon, index name
    weights.npz       U, V, b, W, c (read back with allow_pickle=False)
    history.csv       one row per epoch
    metrics.csv       one row per model
    metrics_by_lead.csv   one row per (model, lead), regression only
    confusion_<split>.csv   classification only
    diagnostics.npz   the measured Diagnostics (arrays only, no pickle)

Writing is atomic: everything goes into a temporary folder beside the
target, which is then renamed into place. An existing folder is replaced
only when it is an rnnkit fit folder (or empty).
"""
from __future__ import annotations

import json
import math
import os
import shutil
import tempfile
import uuid
from pathlib import Path

import numpy as np
import pandas as pd

from ..data._config import Config
from ..data._windows import Scaler

FORMAT = "rnnkit-fit"
VERSION = 2  # 2: horizon H means leads 1..H (multi-output); interval widths and notes stored
PARAM_NAMES = ("U", "V", "b", "W", "c")
_DIAG_ARRAYS = ("gradient_through_time", "singular_values", "eigenvalues", "saturation",
                "window_state", "val_states", "val_times")


def _plain(v):
    """A numpy scalar as a JSON-ready Python value."""
    v = v.item() if isinstance(v, np.generic) else v
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


def _document(result) -> dict:
    spec = result.spec
    sc = spec.scaler
    classes = None if spec.classes is None else [_plain(c) for c in spec.classes.tolist()]
    from .._version import __version__

    return {
        "format": FORMAT,
        "version": VERSION,
        "rnnkit_version": __version__,
        "config": result.config.to_dict(),
        "outcome": {"status": result.status, "best_epoch": result.best_epoch,
                    "compiles": result.compiles, "seconds": result.seconds,
                    "notes": list(result.notes)},
        # conformal half widths (C levels, L leads, O targets), for forecasts from a loaded fit
        "interval_widths": None if result.interval_widths is None else
        [[[float(v) for v in row] for row in level] for level in result.interval_widths],
        "data": {
            "input_names": list(spec.input_names),
            "target_names": list(spec.target_names),
            "classes": classes,
            "window": spec.window,
            "horizon": spec.horizon,
            "index_name": spec.index_name,
            # float repr in JSON round-trips exactly, so a loaded fit scales bit for bit alike
            "scaler": {"method": sc.method, "columns": list(sc.columns),
                       "mean": [float(v) for v in sc.mean], "scale": [float(v) for v in sc.scale],
                       "input_names": list(sc.input_names), "target_names": list(sc.target_names)},
        },
    }


def _is_fit_folder(path: Path) -> bool:
    try:
        with open(path / "config.json", encoding="utf-8") as f:
            return json.load(f).get("format") == FORMAT
    except (OSError, ValueError, AttributeError):
        return False


def _diagnostics_arrays(d) -> dict:
    out = {k: np.asarray(getattr(d, k)) for k in _DIAG_ARRAYS}
    if out["val_times"].dtype == object:  # labels of mixed type: keep their text (no pickle)
        out["val_times"] = out["val_times"].astype(str)
    out["split"] = np.asarray(d.split)
    out["activation"] = np.asarray(d.activation)
    out["spectral_radius"] = np.asarray(d.spectral_radius, np.float64)
    out["gradient_windows"] = np.asarray(d.gradient_windows, np.int64)
    return out


def save_fit(result, path) -> None:
    """Write ``result`` to the folder ``path`` atomically (temp folder beside it, then rename).

    Raises:
      ValueError: ``path`` is a file, or a non-empty folder that is not an rnnkit fit folder.
    """
    path = Path(path)
    if path.exists():
        if not path.is_dir():
            raise ValueError(f"`path` ({str(path)!r}) is a file; give a folder path for the fit")
        if any(path.iterdir()) and not _is_fit_folder(path):
            raise ValueError(f"`path` ({str(path)!r}) is a folder that does not hold an rnnkit fit "
                             f"(no config.json with format {FORMAT!r}); refusing to overwrite it: "
                             "choose a new or empty folder")
    path.parent.mkdir(parents=True, exist_ok=True)
    diag = result.diagnostics if (result.prepared is not None or result._diagnostics is not None) else None
    tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent))
    try:
        with open(tmp / "config.json", "w", encoding="utf-8") as f:
            json.dump(_document(result), f, indent=2, allow_nan=False)
        np.savez(tmp / "weights.npz", **{k: np.asarray(result.params[k]) for k in PARAM_NAMES})
        result.history.to_csv(tmp / "history.csv", index=False)
        result.metrics.to_csv(tmp / "metrics.csv", index=True)
        if len(result.metrics_by_lead):
            result.metrics_by_lead.to_csv(tmp / "metrics_by_lead.csv", index=True)
        for split, table in result.confusion.items():
            table.to_csv(tmp / f"confusion_{split}.csv")
        if diag is not None:
            np.savez(tmp / "diagnostics.npz", **_diagnostics_arrays(diag))
        old = None
        if path.exists():
            old = path.parent / f".{path.name}.old-{uuid.uuid4().hex[:8]}"
            os.rename(path, old)
        os.rename(tmp, path)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def _read_spec(doc: dict):
    from ..data._prepare import label_array
    from ..data._predict import DataSpec

    data = doc["data"]
    s = data["scaler"]
    scaler = Scaler(s["method"], tuple(s["columns"]), np.asarray(s["mean"], np.float64),
                    np.asarray(s["scale"], np.float64), tuple(s["input_names"]),
                    tuple(s["target_names"]))
    classes = None if data["classes"] is None else label_array(data["classes"])
    return DataSpec(Config.from_dict(doc["config"]), tuple(data["input_names"]),
                    tuple(data["target_names"]), classes, scaler, int(data["window"]),
                    int(data["horizon"]), data["index_name"])


def _read_diagnostics(file: Path):
    from ..inspection._diagnose import Diagnostics

    if not file.exists():
        return None
    with np.load(file, allow_pickle=False) as z:
        a = {k: z[k] for k in z.files}
    return Diagnostics(str(a["split"]), str(a["activation"]), a["gradient_through_time"],
                       int(a["gradient_windows"]), a["singular_values"], a["eigenvalues"],
                       float(a["spectral_radius"]), a["saturation"], a["window_state"],
                       a["val_states"], a["val_times"])


def read_fit(path) -> dict:
    """Read the files of a fit folder written by ``save_fit``.

    Returns the parts ``FitResult`` is built from (``_fit.load_fit`` does that,
    so this module never imports the result class): params, spec, status,
    history, metrics, confusion, best_epoch, compiles, seconds, and
    ``read_diagnostics``, a function that reads the stored diagnostics.
    """
    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"`path` must be a folder path (str or pathlib.Path), got {type(path).__name__}")
    path = Path(path)
    if not _is_fit_folder(path):
        raise ValueError(f"`path` ({str(path)!r}) is not an rnnkit fit folder (config.json with format "
                         f"{FORMAT!r}); save one with result.save(path)")
    with open(path / "config.json", encoding="utf-8") as f:
        doc = json.load(f)
    if doc.get("version") == 1:
        raise ValueError(f"{str(path)!r} is a version 1 fit folder, whose `horizon` meant one value that "
                         "many steps ahead (since version 2: leads 1..horizon at once); fit and save again")
    if doc.get("version") != VERSION:
        raise ValueError(f"{str(path)!r} has fit format version {doc.get('version')!r}; this rnnkit "
                         f"reads version {VERSION}")
    spec = _read_spec(doc)
    with np.load(path / "weights.npz", allow_pickle=False) as z:
        params = {k: z[k] for k in PARAM_NAMES}
    history = pd.read_csv(path / "history.csv", float_precision="round_trip")
    metrics = pd.read_csv(path / "metrics.csv", index_col=0, float_precision="round_trip")
    confusion = {}
    for file in sorted(path.glob("confusion_*.csv")):
        table = pd.read_csv(file, index_col=0)
        table.index = pd.Index(spec.classes, name="true")
        table.columns = pd.Index(spec.classes, name="predicted")
        confusion[file.stem[len("confusion_"):]] = table
    by_lead = pd.DataFrame()
    if (path / "metrics_by_lead.csv").exists():
        by_lead = pd.read_csv(path / "metrics_by_lead.csv", index_col=[0, 1], float_precision="round_trip")
    widths = doc.get("interval_widths")
    out = doc["outcome"]
    return dict(params=params, spec=spec, status=out["status"], history=history, metrics=metrics,
                metrics_by_lead=by_lead, notes=tuple(out.get("notes", ())),
                interval_widths=None if widths is None else np.asarray(widths, np.float64),
                confusion=confusion, best_epoch=out["best_epoch"], compiles=out["compiles"],
                seconds=out["seconds"],
                read_diagnostics=lambda: _read_diagnostics(path / "diagnostics.npz"))
