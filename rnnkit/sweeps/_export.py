"""The experiment document: a Config with its score, data fingerprint and software.

Layout (JSON, described by ``config.schema.json``, draft 2020-12)::

    {"format": "rnnkit.experiment", "version": 2,
     "config":  {...every Config field...},
     "metric":  {"name": "val_rmse", "value": 0.41},
     "metrics": {"val_rmse": 0.41, "persistence_val_rmse": 0.55, ...},
     "scoring": {"folds": 5, "scheme": "rolling origin", "window": "expanding", ...},
     "data":    {"fingerprint": "sha256:...", "rows": 8760, "columns": [...],
                 "start": "2023-01-02T00:00:00", "end": "..."},
     "software": {"rnnkit": "0.1.0", "jax": "0.10.2", ...},
     "created": "2025-01-01T12:00:00+00:00"}

Only ``format``, ``version`` and ``config`` are required, and a bare config
object (no envelope) is read too. Every read and write is checked against the
schema with jsonschema; files are written atomically (temp file + os.replace).
"""
from __future__ import annotations

import datetime as _dt
import functools
import hashlib
import importlib.metadata
import json
import math
import os
import platform
import re
import stat
import warnings
from pathlib import Path
from typing import Any, Optional, Union

import numpy as np
import pandas as pd
from pandas.api import types as ptypes

from ..data._atomic import write_text
from ..data._checks import require_column, resolve_columns
from ..data._config import Config

FORMAT = "rnnkit.experiment"
VERSION = 2
# Version 1 read `horizon` H as ONE value H steps ahead; since version 2 it means the H
# leads 1..H of a multi-output network (and `transform`, `coverage` exist).
_OLD = {1: "version 1 documents read `horizon` as one value that many steps ahead; since version 2 "
           "it means leads 1..horizon at once (and adds `transform`, `coverage`)"}
SCHEMA_PATH = Path(__file__).with_name("config.schema.json")
_SOFTWARE = ("rnnkit", "jax", "jaxlib", "optax", "numpy", "pandas")


class FingerprintWarning(UserWarning):
    """The data given now is not the data the document was made from."""


@functools.lru_cache(maxsize=None)
def schema() -> dict:
    """The JSON Schema (draft 2020-12) of the experiment document, as shipped."""
    with open(SCHEMA_PATH, encoding="utf-8") as f:
        return json.load(f)


def _strict_int(checker, x) -> bool:
    # JSON Schema counts 8.0 as an integer; Config does not, so neither do we.
    return isinstance(x, int) and not isinstance(x, bool)


@functools.lru_cache(maxsize=None)
def _validator(part: str):
    # jsonschema is imported here, when a document is first checked: importing it takes
    # about 1.4 s here (its format checkers), which every `import rnnkit` and every sweep
    # worker process would otherwise pay.
    from jsonschema import Draft202012Validator, validators

    strict = validators.extend(
        Draft202012Validator,
        type_checker=Draft202012Validator.TYPE_CHECKER.redefine("integer", _strict_int))
    s = schema()
    if part == "config":  # the config object alone, with the same $defs
        s = {"$schema": s["$schema"], "$defs": s["$defs"], "$ref": "#/$defs/config"}
    return strict(s)


def validate(doc: Any, *, part: str = "document", where: str = "document") -> None:
    """Check a document (or a bare config) against the schema.

    Args:
        doc: the parsed JSON value.
        part: "document" (the envelope) or "config" (a bare config object).
        where: what to call the input in the message (e.g. the file name).
    Raises:
        ValueError naming the JSON path of the first bad value (e.g.
        ``$.config.hidden``) and the rule it breaks.
    """
    if part not in ("document", "config"):
        raise ValueError(f"`part` (={part!r}) must be 'document' or 'config'")
    errors = list(_validator(part).iter_errors(doc))
    if errors:
        from jsonschema.exceptions import best_match

        e = best_match(errors)
        more = f" (and {len(errors) - 1} more problem(s))" if len(errors) > 1 else ""
        raise ValueError(f"{where}: {e.json_path}: {e.message}{more}; fix that value "
                         f"(the rules are in {SCHEMA_PATH.name}, JSON Schema draft 2020-12)")


# ---------------------------------------------------------------- data fingerprint


def used_columns(df: pd.DataFrame, config: Optional[Config]) -> list:
    """The columns a run reads: target(s), features, time, group and split columns (sorted).

    config None: every column of the frame.
    """
    if config is None:
        return sorted(df.columns, key=str)
    special = [c for c in (config.time_column, config.group_column, config.split_column) if c]
    for field in ("time_column", "group_column", "split_column"):
        if getattr(config, field) is not None:
            require_column(df, getattr(config, field), field)
    targets, feats = resolve_columns(df, config, special)
    return sorted(set(targets) | set(feats) | set(special))


def resolved_columns(df: pd.DataFrame, config: Config) -> Config:
    """`config` with the target and input columns it uses on `df` written out (a target or
    features left to be chosen would choose other columns on a reordered frame)."""
    special = [c for c in (config.time_column, config.group_column, config.split_column) if c]
    targets, feats = resolve_columns(df, config, special)
    return config.replace(target=targets[0] if len(targets) == 1 else tuple(targets), features=tuple(feats))


def _missing(v) -> bool:
    m = pd.isna(v)
    return isinstance(m, (bool, np.bool_)) and bool(m)  # a list-like value is never "missing"


def _encode(values) -> bytes:
    """The bytes hashed for one column (or the index); see ``fingerprint``."""
    dtype = getattr(values, "dtype", None)
    number = ptypes.is_numeric_dtype(dtype) and not ptypes.is_complex_dtype(dtype)
    if ptypes.is_bool_dtype(dtype) or number:
        v = pd.Series(values).to_numpy(dtype=np.float64, na_value=np.nan)  # (R,)
        v = np.where(np.isnan(v), np.float64(np.nan), v)  # one NaN bit pattern
        return b"f8\n" + v.astype("<f8").tobytes()
    if ptypes.is_datetime64_any_dtype(dtype):
        idx = pd.DatetimeIndex(values)
        if idx.tz is not None:
            idx = idx.tz_convert("UTC").tz_localize(None)
        return b"M8\n" + np.asarray(idx.as_unit("ns").asi8, dtype="<i8").tobytes()
    out = [b"\x01" if _missing(v) else str(v).encode("utf-8") for v in list(values)]
    return b"str\n" + b"\x00".join(out) + b"\x00"


def fingerprint(df: pd.DataFrame, config: Optional[Config]) -> str:
    """sha256 of the index and the used columns of a frame.

    The exact bytes hashed, in order:
      1. ``b"rnnkit.fingerprint/1\\n"`` and ``f"rows={len(df)}\\n"`` (UTF-8);
      2. for the index (named ``<index>``) and then each used column, in sorted
         name order: the name in UTF-8 and ``b"\\n"``, then the values:
         - numbers and booleans: ``b"f8\\n"`` + float64 little-endian (NaN as
           numpy's quiet NaN), so an int column and the same values as floats agree;
         - datetimes: ``b"M8\\n"`` + int64 little-endian nanoseconds since
           1970-01-01 UTC (time-zone aware values converted to UTC; NaT as -2**63);
         - anything else: ``b"str\\n"`` + each value's ``str()`` in UTF-8
           (a missing value as ``b"\\x01"``), each followed by ``b"\\x00"``.
    Column order in the frame and unused columns do not matter.

    Args:
        df: the frame.
        config: decides which columns are used (``used_columns``); None: all of them.
    Returns:
        "sha256:" + 64 hex digits.
    """
    h = hashlib.sha256()
    h.update(b"rnnkit.fingerprint/1\n" + f"rows={len(df)}\n".encode("utf-8"))
    h.update(b"<index>\n" + _encode(df.index))
    for name in used_columns(df, config):
        h.update(str(name).encode("utf-8") + b"\n" + _encode(df[name]))
    return "sha256:" + h.hexdigest()


def _label(v) -> Union[str, float, int, None]:
    if _missing(v):
        return None
    if isinstance(v, (pd.Timestamp, _dt.datetime, _dt.date)):
        return v.isoformat()
    if isinstance(v, (bool, np.bool_)):
        return str(bool(v))
    if isinstance(v, (int, np.integer)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        return float(v)
    return str(v)


def data_block(df: pd.DataFrame, config: Config) -> dict:
    """The document's "data" part: fingerprint, rows, used columns, first and last index label."""
    if not isinstance(df, pd.DataFrame):
        raise TypeError(f"`df` must be a pandas DataFrame, got {type(df).__name__}")
    idx = pd.Index(df[config.time_column] if config.time_column else df.index)
    return {"fingerprint": fingerprint(df, config), "rows": int(len(df)),
            "columns": [str(c) for c in used_columns(df, config)],
            "start": _label(idx[0]) if len(df) else None,
            "end": _label(idx[-1]) if len(df) else None}


# ---------------------------------------------------------------- the document


def software() -> dict:
    """Versions of rnnkit, jax, jaxlib, optax, numpy, pandas and Python."""
    out = {}
    for name in _SOFTWARE:
        try:
            out[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            out[name] = None
    if out["rnnkit"] is None:  # run from a source tree, not installed
        from .._version import __version__
        out["rnnkit"] = __version__
    out["python"] = platform.python_version()
    return out


def _number(v) -> Optional[float]:
    v = float(v)
    return v if math.isfinite(v) else None  # JSON has no NaN/inf


def document(config: Config, *, metric=None, metrics=None, data=None, notes=None, scoring=None) -> dict:
    """Build (and check) an experiment document.

    Args:
        config: the Config.
        metric: ``(name, value)`` or ``{"name", "value"}``: the score it was chosen by.
        metrics: ``{name: value}`` of every score.
        data: a DataFrame (its fingerprint is computed with `config`, and the
            config's target and features are written out as resolved on it) or a
            ready data dict.
        notes: free text.
        scoring: how the metric was measured: {"folds": 1, "scheme": "split", ...} or a
            backtest's {"folds": K, "scheme": "rolling origin" | "sequences", "window",
            "test_size", "seed"} (the metrics are then means over the folds).
    Returns:
        dict, valid against the schema.
    """
    if not isinstance(config, Config):
        raise TypeError(f"`config` must be an rnnkit.Config, got {type(config).__name__}")
    if isinstance(data, pd.DataFrame):
        config = resolved_columns(data, config)
    doc = {"format": FORMAT, "version": VERSION, "config": config.to_dict()}
    if metric is not None:
        name, value = (metric["name"], metric["value"]) if isinstance(metric, dict) else metric
        doc["metric"] = {"name": str(name), "value": None if value is None else _number(value)}
    if metrics is not None:
        doc["metrics"] = {str(k): None if v is None else _number(v) for k, v in dict(metrics).items()}
    if scoring is not None:
        doc["scoring"] = dict(scoring)
    if data is not None:
        doc["data"] = data_block(data, config) if isinstance(data, pd.DataFrame) else dict(data)
    doc["software"] = software()
    doc["created"] = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    if notes is not None:
        doc["notes"] = notes
    validate(doc)
    return doc


def write_document(doc: dict, path) -> Path:
    """Write a checked document atomically (temp file in the same folder, then os.replace)."""
    validate(doc)
    path = Path(path)
    if path.is_dir():
        raise ValueError(f"`path` ({str(path)!r}) is a folder; give a file name, "
                         f"for example {str(path / 'experiment.json')!r}")
    path.parent.mkdir(parents=True, exist_ok=True)  # as FitResult.save does
    return write_text(path, json.dumps(doc, indent=2, allow_nan=False) + "\n")


def _no_constant(name):
    raise ValueError(f"{name} is not valid JSON; write a finite number or null")


MAX_JSON_BYTES = 16 * 2**20  # a document or sweep file larger than this is refused
MAX_JSON_DEPTH = 32  # nesting of objects and arrays (our documents use 3)
_JSON_STRING = re.compile(rb'"(?:[^"\\]|\\.)*"')


def _no_duplicates(pairs):
    seen = {}
    for k, v in pairs:
        if k in seen:
            raise ValueError(f"the key {k!r} appears twice in one object; keep one")
        seen[k] = v
    return seen


def read_json_file(path, what: str = "document") -> Any:
    """Parse a JSON file strictly; every refusal is a ValueError naming `what` and the file.

    Refused: anything but a regular file (a folder, a device, a link to one), more
    than MAX_JSON_BYTES, bytes that are not UTF-8, nesting deeper than
    MAX_JSON_DEPTH, a key repeated in one object, NaN/Infinity, and text that is
    not JSON.
    """
    where = f"{what} {str(path)!r}"
    try:
        st = os.stat(path)  # follows links: a link to /dev/zero is a device here
    except OSError as e:
        raise ValueError(f"{where}: cannot be read ({e.strerror})") from None
    if not stat.S_ISREG(st.st_mode):
        raise ValueError(f"{where} is not a regular file; give the path of a JSON file")
    with open(path, "rb") as f:
        raw = f.read(MAX_JSON_BYTES + 1)
    if len(raw) > MAX_JSON_BYTES:
        raise ValueError(f"{where} is larger than {MAX_JSON_BYTES} bytes; this is not a document "
                         "rnnkit writes")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as e:
        raise ValueError(f"{where} is not UTF-8 text (byte {e.start}); save it as UTF-8") from None
    # Depth of brackets outside strings, measured before parsing (the parser recurses).
    brackets = np.frombuffer(_JSON_STRING.sub(b'""', raw), dtype=np.uint8)
    step = np.isin(brackets, (ord("["), ord("{"))).astype(np.int64) - np.isin(
        brackets, (ord("]"), ord("}")))
    if len(step) and np.cumsum(step).max() > MAX_JSON_DEPTH:
        raise ValueError(f"{where} nests objects/arrays deeper than {MAX_JSON_DEPTH} levels")
    try:
        return json.loads(text, parse_constant=_no_constant, object_pairs_hook=_no_duplicates)
    except json.JSONDecodeError as e:
        raise ValueError(f"{where}: not JSON (line {e.lineno}: {e.msg}); give a file written by "
                         "rnnkit.save_config") from None
    except (ValueError, RecursionError) as e:
        raise ValueError(f"{where}: {e}") from None


def read_document(source) -> dict:
    """Read and check a document; a bare config object comes back wrapped in an envelope.

    Args:
        source: a path, or an already parsed dict.
    Returns:
        dict with at least "format", "version", "config".
    """
    where = "document"
    if isinstance(source, dict):
        doc = source
    elif isinstance(source, (str, os.PathLike)):
        where = str(source)
        doc = read_json_file(source)
    else:
        raise TypeError(f"`path` must be a file path or a dict, got {type(source).__name__}")
    if isinstance(doc, dict) and not {"format", "version", "config"} & set(doc):
        validate(doc, part="config", where=where)
        return {"format": FORMAT, "version": VERSION, "config": doc}
    old = doc.get("version") if isinstance(doc, dict) and doc.get("format") == FORMAT else None
    if isinstance(old, int) and not isinstance(old, bool) and old in _OLD:
        raise ValueError(f"{where}: $.version {old} is no longer read: {_OLD[old]}; export the "
                         f"experiment again (version {VERSION})")
    validate(doc, where=where)
    return doc


def save_config(config: Config, path, **extra) -> Path:
    """Write `config` as an experiment document (JSON, checked, atomic).

    Args:
        config: the Config.
        path: file to write.
        **extra: optional parts: ``metric=(name, value)``, ``metrics={...}``,
            ``data=df`` (fingerprints the frame) or a data dict, ``notes="..."``.
    Returns:
        the Path written.
    """
    allowed = ("metric", "metrics", "data", "notes")
    unknown = sorted(set(extra) - set(allowed))
    if unknown:
        raise TypeError(f"save_config got unknown part(s) {unknown}; the optional parts are "
                        f"{list(allowed)}")
    return write_document(document(config, **extra), path)


def load_config(path, *, df: Optional[pd.DataFrame] = None) -> Config:
    """Read a Config from an experiment document or a bare config JSON file.

    Args:
        path: the file (or a parsed dict).
        df: optional frame; when the document holds a data fingerprint that
            differs from this frame's, a FingerprintWarning is issued.
    Returns:
        Config.
    """
    doc = read_document(path)
    try:
        config = Config.from_dict(doc["config"])
    except (TypeError, ValueError) as e:
        where = "document" if isinstance(path, dict) else path
        raise ValueError(f"{where}: $.config: {e}") from None
    if df is not None and "data" in doc:
        check_fingerprint(df, doc)
    return config


def check_fingerprint(df: pd.DataFrame, source) -> bool:
    """Whether `df` is the data a document was made from (warns FingerprintWarning if not).

    Args:
        df: the frame at hand.
        source: a document path or dict holding "data": {"fingerprint": ...}.
    Returns:
        True when the fingerprints agree, False (after a warning) when they differ.
    """
    doc = read_document(source)
    if "data" not in doc:
        raise ValueError("the document has no `data` part, so there is no fingerprint to compare; "
                         "write it with save_config(..., data=df)")
    config = Config.from_dict(doc["config"])
    now, then = fingerprint(df, config), doc["data"]["fingerprint"]
    if now != then:
        data = doc["data"]
        warnings.warn(f"the frame's fingerprint {now[:19]}... differs from the document's "
                      f"{then[:19]}... (columns {data['columns']}, {data['rows']} rows then, "
                      f"{len(df)} now): "
                      "results may not reproduce; pass the frame the document was made from",
                      FingerprintWarning, stacklevel=2)
        return False
    return True
