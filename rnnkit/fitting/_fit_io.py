"""Save a FitResult to a folder and read it back.

The folder (our own small layout):

    config.json       format "rnnkit-fit", version; the Config; the outcome
                      (status, best epoch, notes, ...); the conformal half widths;
                      what predict needs for a new
                      frame: input and target names, class labels, the fitted
                      scaler's statistics, window, horizon, index name
    weights.npz       the cell's parameters: U, V, b, W, c (GRU also bn), read back
                      with allow_pickle=False
    history.csv       one row per epoch
    metrics.csv       one row per model
    metrics_by_lead.csv   one row per (model, lead), regression only
    confusion_<split>.csv   classification only
    diagnostics.npz   the measured Diagnostics (arrays only, no pickle)
    manifest.json     SHA-256 and size of every file above (written last)

Writing is atomic: everything goes into a temporary folder beside the
target. A new path is one rename; an existing fit is swapped with the new
one in one step where the system can (Linux renameat2 RENAME_EXCHANGE),
else moved aside to ``.<name>.old-*`` before the new folder is renamed in.
Should the process die between those two renames, the next save or load
of the path puts the old fit back, so the path always holds a complete fit.
An existing folder is replaced only when it is an rnnkit fit folder (or
empty). Reading checks every file against the manifest and the config,
weights and scaler against one another, naming the file at fault.
"""
from __future__ import annotations

import ctypes
import hashlib
import json
import math
import os
import shutil
import tempfile
import uuid
import zipfile
from pathlib import Path

import numpy as np
import pandas as pd

from ..data._config import Config
from ..data._windows import Scaler
from ..recurrent._cells import get_cell

FORMAT = "rnnkit-fit"
VERSION = 2  # 2: horizon H means leads 1..H (multi-output); interval widths and notes stored
PARAM_NAMES = ("U", "V", "b", "W", "c")  # the Elman cell's; param_names(cell) for any cell
MANIFEST = "manifest.json"
_DIAG_ARRAYS = ("gradient_through_time", "singular_values", "eigenvalues", "saturation",
                "window_state", "val_states", "val_times")


def param_names(cell: str) -> tuple:
    """The names of the weights a fit of this cell stores (``init_params``' layout)."""
    return get_cell(cell).param_names


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
    out["cell"] = np.asarray(d.cell)
    out["block_names"] = np.asarray(list(d.block_singular_values), dtype=str)
    out["block_singular_values"] = np.asarray(list(d.block_singular_values.values()), np.float64)
    out["gate_names"] = np.asarray(list(d.gate_names), dtype=str)
    for k in ("gate_near_zero", "gate_near_one", "gate_mean", "forget_along_window"):
        out[k] = np.asarray(getattr(d, k), np.float64)
    return out


def _digest(file: Path) -> str:
    h = hashlib.sha256()
    with open(file, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _write_manifest(folder: Path) -> None:
    files = {p.name: {"sha256": _digest(p), "bytes": p.stat().st_size}
             for p in sorted(folder.iterdir()) if p.is_file() and p.name != MANIFEST}
    with open(folder / MANIFEST, "w", encoding="utf-8") as f:
        json.dump({"format": FORMAT + "-manifest", "files": files}, f, indent=2)
        f.flush()
        os.fsync(f.fileno())


def _exchange(a: Path, b: Path) -> bool:
    """Swap two paths in one step (Linux renameat2 with RENAME_EXCHANGE); False where unsupported."""
    try:
        fn = ctypes.CDLL(None, use_errno=True).renameat2
    except (OSError, AttributeError):
        return False
    at_fdcwd, rename_exchange = -100, 2
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    return fn(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange) == 0


def _leftovers(path: Path, kind: str) -> list:
    """Our temporary (kind "tmp") or moved-aside ("old") folders beside `path` whose writing
    process is gone (``.<name>.<pid>-*.tmp``, ``.<name>.old-<pid>-*``), newest first. A folder
    of a live process is another save in progress and is left alone."""
    pattern = f".{path.name}.*.tmp" if kind == "tmp" else f".{path.name}.old-*"
    head = f".{path.name}." if kind == "tmp" else f".{path.name}.old-"
    found = []
    for p in path.parent.glob(pattern):
        pid = p.name[len(head):].split("-", 1)[0]
        if p.is_dir() and not (pid.isdigit() and _alive(int(pid))):
            found.append(p)
    return sorted(found, key=lambda p: p.stat().st_mtime, reverse=True)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError):
        return True
    return True


def recover(path) -> None:
    """Put a fit back at `path` if a save was killed between its two renames; remove leftovers.

    A missing `path` with a moved-aside ``.<name>.old-<pid>-*`` folder beside it,
    whose process is gone, means the old fit was moved and the new one never
    arrived: the old one goes back. Leftovers of live processes are not touched.
    """
    path = Path(path)
    if not path.parent.is_dir():
        return
    if not path.exists():
        for old in _leftovers(path, "old"):
            if (old / MANIFEST).exists():
                os.rename(old, path)
                break
    if path.exists():
        for p in _leftovers(path, "tmp") + _leftovers(path, "old"):
            shutil.rmtree(p, ignore_errors=True)


def save_fit(result, path) -> None:
    """Write ``result`` to the folder ``path`` atomically (temp folder beside it, then rename).

    Raises:
      ValueError: ``path`` is a file, or a non-empty folder that is not an rnnkit fit folder.
    """
    path = Path(path)
    recover(path)
    if path.exists():
        if not path.is_dir():
            raise ValueError(f"`path` ({str(path)!r}) is a file; give a folder path for the fit")
        if any(path.iterdir()) and not _is_fit_folder(path):
            raise ValueError(f"`path` ({str(path)!r}) is a folder that does not hold an rnnkit fit "
                             f"(no config.json with format {FORMAT!r}); refusing to overwrite it: "
                             "choose a new or empty folder")
    path.parent.mkdir(parents=True, exist_ok=True)
    diag = result.diagnostics if (result.prepared is not None or result._diagnostics is not None) else None
    tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.{os.getpid()}-", suffix=".tmp", dir=path.parent))
    old = None
    try:
        with open(tmp / "config.json", "w", encoding="utf-8") as f:
            json.dump(_document(result), f, indent=2, allow_nan=False)
        np.savez(tmp / "weights.npz", **{k: np.asarray(result.params[k])
                                         for k in param_names(result.config.cell)})
        result.history.to_csv(tmp / "history.csv", index=False)
        result.metrics.to_csv(tmp / "metrics.csv", index=True)
        if len(result.metrics_by_lead):
            result.metrics_by_lead.to_csv(tmp / "metrics_by_lead.csv", index=True)
        for split, table in result.confusion.items():
            table.to_csv(tmp / f"confusion_{split}.csv")
        if diag is not None:
            np.savez(tmp / "diagnostics.npz", **_diagnostics_arrays(diag))
        _write_manifest(tmp)
        if not path.exists():
            os.rename(tmp, path)
        elif _exchange(tmp, path):
            shutil.rmtree(tmp, ignore_errors=True)  # it holds the old fit now
        else:
            old = path.parent / f".{path.name}.old-{os.getpid()}-{uuid.uuid4().hex[:8]}"
            os.rename(path, old)
            os.rename(tmp, path)  # a kill before this line: the next recover() puts `old` back
            shutil.rmtree(old, ignore_errors=True)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        if old is not None and old.exists() and not path.exists():
            os.rename(old, path)  # interrupted between the renames: the old fit goes back
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
    with open(file, "rb") as fh, np.load(fh, allow_pickle=False) as z:
        a = {k: z[k] for k in z.files}
    gated = {}
    if "cell" in a:  # written since the gated cells; older folders hold an Elman fit
        gated = dict(cell=str(a["cell"]),
                     block_singular_values=dict(zip(a["block_names"].tolist(), a["block_singular_values"])),
                     gate_names=tuple(a["gate_names"].tolist()), gate_near_zero=a["gate_near_zero"],
                     gate_near_one=a["gate_near_one"], gate_mean=a["gate_mean"],
                     forget_along_window=a["forget_along_window"])
    return Diagnostics(str(a["split"]), str(a["activation"]), a["gradient_through_time"],
                       int(a["gradient_windows"]), a["singular_values"], a["eigenvalues"],
                       float(a["spectral_radius"]), a["saturation"], a["window_state"],
                       a["val_states"], a["val_times"], **gated)


def _check_manifest(path: Path) -> set:
    """Every file listed in the manifest is there, whole and unchanged; returns the listed names."""
    file = path / MANIFEST
    if not file.is_file():
        raise ValueError(f"{str(file)!r} is missing: the fit folder is incomplete or was written "
                         "by hand; save it again with result.save(path)")
    try:
        with open(file, encoding="utf-8") as f:
            listed = json.load(f)["files"]
        listed = {str(k): (str(v["sha256"]), int(v["bytes"])) for k, v in listed.items()}
    except (ValueError, KeyError, TypeError, AttributeError) as e:
        raise ValueError(f"{str(file)!r} is damaged ({type(e).__name__}: {e}); save the fit again") from None
    for name in ("config.json", "weights.npz", "history.csv", "metrics.csv"):
        if name not in listed:
            raise ValueError(f"{str(file)!r} does not list {name}; save the fit again")
    for name, (digest, size) in listed.items():
        f = path / name
        if os.path.basename(name) != name or not f.is_file():
            raise ValueError(f"{str(f)!r} is missing (listed in {MANIFEST}); the fit folder is "
                             "incomplete: save it again")
        if f.stat().st_size != size:
            raise ValueError(f"{str(f)!r} has {f.stat().st_size} bytes, {MANIFEST} says {size}: "
                             "the file was truncated or changed; save the fit again")
        if _digest(f) != digest:
            raise ValueError(f"{str(f)!r} does not match its SHA-256 in {MANIFEST}: the file was "
                             "changed after saving; save the fit again")
    return set(listed)


def _check_consistent(path: Path, spec, params: dict) -> None:
    """Config, data description, scaler and weights agree with one another."""
    cfg, sc = spec.config, spec.scaler
    where = repr(str(path / "config.json"))
    if cfg.window != "full" and spec.window != cfg.window:
        raise ValueError(f"{where}: `window` is {cfg.window} in the config but the fit used "
                         f"{spec.window}; the file was edited: save the fit again")
    if spec.horizon != (0 if cfg.window == "full" else cfg.horizon):
        raise ValueError(f"{where}: `horizon` is {cfg.horizon} in the config but the fit used "
                         f"{spec.horizon}; the file was edited: save the fit again")
    n = len(sc.columns)
    if sc.mean.shape != (n,) or sc.scale.shape != (n,):
        raise ValueError(f"{where}: the scaler has {n} columns but {sc.mean.size} means and "
                         f"{sc.scale.size} scales")
    if not np.isfinite(sc.mean).all():
        raise ValueError(f"{where}: the scaler's mean holds NaN/inf (columns "
                         f"{[c for c, m in zip(sc.columns, sc.mean) if not np.isfinite(m)]})")
    if not (np.isfinite(sc.scale).all() and (sc.scale > 0).all()):
        raise ValueError(f"{where}: the scaler's scale must be finite and > 0 (columns "
                         f"{[c for c, v in zip(sc.columns, sc.scale) if not (np.isfinite(v) and v > 0)]})")
    missing = [c for c in (*spec.input_names, *sc.target_names) if c not in sc.columns]
    if missing:
        raise ValueError(f"{where}: the scaler has no statistics for {missing}")
    n_in = len(spec.input_names)
    n_out = len(spec.target_names) if spec.classes is None else len(spec.classes)
    if spec.classes is None and cfg.mode == "many-to-one" and cfg.window != "full" and spec.horizon > 1:
        n_out *= spec.horizon  # leads 1..horizon, lead-major
    h = cfg.hidden
    wfile = repr(str(path / "weights.npz"))
    U, V, W, c = (np.asarray(params[k]) for k in ("U", "V", "W", "c"))
    if U.ndim != 2 or U.shape[0] != n_in or V.ndim != 2 or V.shape[0] != h or W.shape != (h, n_out) \
            or c.shape != (n_out,):
        raise ValueError(f"{wfile}: weight shapes U {U.shape}, V {V.shape}, W {W.shape}, c {c.shape} do "
                         f"not fit {n_in} inputs, hidden {h} and {n_out} outputs of {where}")
    bad = [k for k in params if not np.isfinite(params[k]).all()]
    if bad:
        raise ValueError(f"{wfile}: weights {bad} hold NaN/inf")


def _read_widths(doc: dict, spec):
    """The stored conformal half widths (C, L, O), or None; checked against the config."""
    widths = doc.get("interval_widths")
    if widths is None:
        return None
    w = np.asarray(widths, np.float64)
    cfg = spec.config
    leads = spec.horizon if (spec.classes is None and cfg.mode == "many-to-one" and cfg.window != "full"
                             and spec.horizon > 1) else 1
    want = (len(cfg.coverage), leads, len(spec.target_names))
    if w.shape != want or not (np.isfinite(w).all() and (w >= 0).all()):
        raise ValueError(f"`interval_widths` has shape {w.shape} (want {want}: coverage levels, leads, "
                         "targets) or holds negative/NaN/inf values; the file was edited")
    return w


def _read(file: Path, reader):
    """reader(file), with a damaged file's error turned into one naming the file."""
    try:
        return reader(file)
    except (OSError, EOFError, KeyError, ValueError, TypeError, zipfile.BadZipFile,
            pd.errors.ParserError, pd.errors.EmptyDataError) as e:
        raise ValueError(f"{str(file)!r} cannot be read ({type(e).__name__}: {e}); the fit folder "
                         "is damaged: save it again") from None


def _read_weights(file: Path, names) -> dict:
    # Our own file handle: np.load leaves its own open when the zip is damaged.
    with open(file, "rb") as fh, np.load(fh, allow_pickle=False) as z:
        missing = [k for k in names if k not in z.files]
        if missing:
            raise KeyError(f"no array {missing}, which this cell's fit needs")
        return {k: z[k] for k in names}


def read_fit(path) -> dict:
    """Read the files of a fit folder written by ``save_fit``.

    Returns the parts ``FitResult`` is built from (``_fit.load_fit`` does that,
    so this module never imports the result class): params, spec, status,
    history, metrics, confusion, best_epoch, compiles, seconds, and
    ``read_diagnostics``, a function that reads the stored diagnostics.
    Raises ValueError naming the file when a file is missing, truncated,
    changed since saving (manifest of SHA-256 digests) or disagrees with the others.
    """
    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"`path` must be a folder path (str or pathlib.Path), got {type(path).__name__}")
    path = Path(path)
    recover(path)
    if not _is_fit_folder(path):
        raise ValueError(f"`path` ({str(path)!r}) is not an rnnkit fit folder (config.json with format "
                         f"{FORMAT!r}); save one with result.save(path)")
    doc = _read(path / "config.json", lambda f: json.loads(f.read_text(encoding="utf-8")))
    if doc.get("version") == 1:
        raise ValueError(f"{str(path)!r} is a version 1 fit folder, whose `horizon` meant one value that "
                         "many steps ahead (since version 2: leads 1..horizon at once); fit and save again")
    if doc.get("version") != VERSION:
        raise ValueError(f"{str(path)!r} has fit format version {doc.get('version')!r}; this rnnkit "
                         f"reads version {VERSION}")
    listed = _check_manifest(path)
    spec = _read(path / "config.json", lambda f: _read_spec(doc))
    params = _read(path / "weights.npz", lambda f: _read_weights(f, param_names(spec.config.cell)))
    _check_consistent(path, spec, params)
    history = _read(path / "history.csv", lambda f: pd.read_csv(f, float_precision="round_trip"))
    metrics = _read(path / "metrics.csv",
                    lambda f: pd.read_csv(f, index_col=0, float_precision="round_trip"))
    confusion = {}
    for name in sorted(n for n in listed if n.startswith("confusion_") and n.endswith(".csv")):
        file = path / name
        table = _read(file, lambda f: pd.read_csv(f, index_col=0))
        table.index = pd.Index(spec.classes, name="true")
        table.columns = pd.Index(spec.classes, name="predicted")
        confusion[file.stem[len("confusion_"):]] = table
    by_lead = pd.DataFrame()
    if "metrics_by_lead.csv" in listed:
        by_lead = _read(path / "metrics_by_lead.csv",
                        lambda f: pd.read_csv(f, index_col=[0, 1], float_precision="round_trip"))
    widths = _read(path / "config.json", lambda f: _read_widths(doc, spec))
    out = doc["outcome"]
    diag = path / "diagnostics.npz"
    return dict(params=params, spec=spec, status=out["status"], history=history, metrics=metrics,
                metrics_by_lead=by_lead, interval_widths=widths,
                confusion=confusion, best_epoch=out["best_epoch"], compiles=out["compiles"],
                seconds=out["seconds"], notes=tuple(str(n) for n in out.get("notes", [])),
                read_diagnostics=lambda: _read(diag, _read_diagnostics) if diag.name in listed else None)
