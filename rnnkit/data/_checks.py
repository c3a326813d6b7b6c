"""Checks and readings of the caller's frame: columns, time, season, missing values.

Nothing here writes into the caller's DataFrame: values are read out with
``to_numpy`` (which may return a view) and every change makes a new array.
Every bad input raises DataError naming the column, the first offending row
and the fix.
"""
from __future__ import annotations

from typing import List, Optional, Sequence, Tuple

import numpy as np
import pandas as pd
from pandas.api import types as ptypes

from ._errors import DataError

# A fixed step -> season length in steps (common practice, no source).
_NS = {"minute": 60 * 10**9, "hour": 3600 * 10**9, "day": 86400 * 10**9}
SEASON_BY_STEP = {_NS["minute"]: 60, _NS["hour"]: 24, _NS["day"]: 7, 7 * _NS["day"]: 52}


def fmt_time(v) -> str:
    """A time for a message: '2024-01-01 08:00:00' rather than numpy's long form."""
    return str(pd.Timestamp(v)) if isinstance(v, np.datetime64) else str(v)


def plain_label(v):
    """A row label for a message: 45 rather than numpy's np.int64(45)."""
    return v.item() if isinstance(v, np.generic) else v


def check_frame(df) -> None:
    """The frame itself: a DataFrame, string column names, not empty."""
    if not isinstance(df, pd.DataFrame):
        raise TypeError(f"`df` must be a pandas DataFrame, got {type(df).__name__}; "
                        "wrap a Series with .to_frame() or an array with pd.DataFrame(...)")
    if isinstance(df.columns, pd.MultiIndex):
        raise DataError("the frame has MultiIndex columns; rnnkit needs one string name per column; "
                        "fix: df.columns = ['_'.join(map(str, c)) for c in df.columns]")
    for c in df.columns:
        if not isinstance(c, str):
            raise DataError(f"column names must be strings; column {c!r} is a {type(c).__name__}; "
                            "fix: df.columns = df.columns.astype(str)")
    dup = df.columns[df.columns.duplicated()]
    if len(dup):
        raise DataError(f"column {dup[0]!r} appears more than once; give every column its own name")
    if len(df) == 0 or df.shape[1] == 0:
        raise DataError(f"the frame is empty ({len(df)} rows, {df.shape[1]} columns); "
                        "pass a frame with a time series in it")


def require_column(df: pd.DataFrame, name: str, field: str) -> None:
    if name not in df.columns:
        raise DataError(f"`{field}` names column {name!r}, which is not in the frame; "
                        f"the columns are {list(df.columns)}; set `{field}` to one of them")


def _not_numeric(s: pd.Series) -> str:
    """Say why a column is not numbers: its first non-number, or that it is numbers stored as text."""
    if not (ptypes.is_object_dtype(s.dtype) or ptypes.is_string_dtype(s.dtype)):
        # complex, datetime, timedelta, interval...: a kind of value, not text to parse
        return f"dtype {s.dtype} is not a real number type, such as {s.iloc[0]!r}"
    bad = (pd.to_numeric(s, errors="coerce").isna() & s.notna()).to_numpy()
    if bad.any():
        pos = int(np.argmax(bad))
        return f"dtype {s.dtype}; first non-number {s.iloc[pos]!r} at row {s.index[pos]!r}"
    present = s.dropna()
    if len(present) == 0:
        return f"dtype {s.dtype} and no value at all"
    first = present.iloc[0]
    kind = "text" if isinstance(first, str) else "Python objects"
    return f"dtype {s.dtype}: numbers stored as {kind}, such as {first!r}; pd.to_numeric converts them"


def _is_number_column(s: pd.Series) -> bool:
    return ptypes.is_numeric_dtype(s.dtype) and not ptypes.is_complex_dtype(s.dtype)


def _is_time_like(s: pd.Series) -> bool:
    """Dates, durations and periods: never class labels, even though they are not floats."""
    return (ptypes.is_datetime64_any_dtype(s.dtype) or ptypes.is_timedelta64_dtype(s.dtype)
            or isinstance(s.dtype, pd.PeriodDtype))


def resolve_columns(df: pd.DataFrame, config, special: Sequence[str]) -> Tuple[List[str], List[str]]:
    """Target and feature names, defaults filled in and every column checked.

    Defaults: target None -> regression: the first numeric column that is not the
    time/group/split column; classification: the first such column that does not
    hold floats or times (labels are strings, ints, bools or categories). features None ->
    every other numeric column.
    """
    special = set(special)
    feats = list(config.features) if config.features is not None else None
    usable = [c for c in df.columns if c not in special and c not in (feats or ())]
    numeric = [c for c in usable if _is_number_column(df[c])]
    if config.target is None:
        if config.task == "regression":
            pool = numeric
        else:
            pool = [c for c in usable if not (ptypes.is_float_dtype(df[c].dtype) or _is_time_like(df[c]))]
        if not pool:
            kind = "numeric " if config.task == "regression" else "label (non-float) "
            raise DataError(f"no {kind}column can serve as `target`; the columns are {list(df.columns)}; "
                            "set `target` to the column to predict")
        targets = [pool[0]]
    else:
        targets = list(config.targets)
    for t in targets:
        require_column(df, t, "target")
        if t in special:
            raise DataError(f"`target` {t!r} is also the time/group/split column; choose another target")
        if config.task == "regression" and not _is_number_column(df[t]):
            raise DataError(f"target column {t!r} is not numeric ({_not_numeric(df[t])}); regression "
                            "needs numbers: convert it with "
                            "pd.to_numeric, or set `task`='classification'")
    if feats is None:
        feats = [c for c in df.columns if c not in special and c not in targets and _is_number_column(df[c])]
    for f in feats:
        require_column(df, f, "features")
        if f in special:
            raise DataError(f"`features` names {f!r}, the time/group/split column; leave it out")
        if not _is_number_column(df[f]):
            raise DataError(f"feature column {f!r} is not numeric ({_not_numeric(df[f])}); "
                            "convert it (pd.to_numeric, or one-hot with "
                            "pd.get_dummies) or leave it out of `features`")
    return targets, feats


def numeric_values(df: pd.DataFrame, name: str, take: Optional[np.ndarray]) -> np.ndarray:
    """(R,) float64 values of one column, rows taken in ``take`` order (never written to)."""
    v = df[name].to_numpy(dtype=np.float64, na_value=np.nan)
    return v if take is None else v[take]


def read_times(df: pd.DataFrame, time_column: Optional[str], take: Optional[np.ndarray]):
    """The time of every row and whether it is a calendar time.

    Returns:
        labels: (R,) the values to report (datetime64 or numbers), or None without time.
        ticks: (R,) int64 nanoseconds (calendar) or float64 (numeric time), or None.
    """
    if time_column is not None:
        s = df[time_column]
        if ptypes.is_datetime64_any_dtype(s.dtype):
            values = pd.DatetimeIndex(s)
        elif _is_number_column(s) and not ptypes.is_bool_dtype(s.dtype):
            v = s.to_numpy(dtype=np.float64, na_value=np.nan)
            v = v if take is None else v[take]
            _no_missing_time(np.isnan(v), df, time_column, take)
            return v, v
        else:
            try:
                values = pd.DatetimeIndex(_parse_times(s))
            except (ValueError, TypeError) as exc:
                raise DataError(f"time column {time_column!r} (dtype {s.dtype}) is neither dates nor numbers "
                                f"({exc}); convert it with pd.to_datetime(df[{time_column!r}]) "
                                "or leave `time_column` None") from None
    elif isinstance(df.index, pd.DatetimeIndex):
        values = df.index
    elif isinstance(df.index, pd.PeriodIndex):
        values = df.index.to_timestamp()
    else:
        return None, None
    if values.tz is not None:
        values = values.tz_convert("UTC").tz_localize(None)
    labels = values.to_numpy(dtype="datetime64[ns]")
    labels = labels if take is None else labels[take]
    _no_missing_time(np.isnat(labels), df, time_column or "index", take)
    return labels, labels.view(np.int64)


def _parse_times(s: pd.Series) -> pd.Series:
    """ISO 8601 text as times; text with several UTC offsets (local time across a DST
    change, as loggers write it) is read as UTC instants."""
    try:
        return pd.to_datetime(s, format="ISO8601")
    except ValueError as exc:  # pandas refuses mixed offsets unless asked for UTC
        try:
            return pd.to_datetime(s, format="ISO8601", utc=True)
        except ValueError:
            raise exc from None


def _no_missing_time(nat: np.ndarray, df, name, take) -> None:
    if nat.any():
        first = int(np.argmax(nat))
        row = df.index[first if take is None else take[first]]
        raise DataError(f"time {name!r} has {int(nat.sum())} missing value(s) (NaT/NaN), first at row {row!r}; "
                        "drop or fill those rows before prepare()")


def check_order(ticks, labels, boundary, row_label, group_of, name) -> None:
    """Time must rise strictly inside each sequence: report unsorted, then duplicated, times."""
    if ticks is None or len(ticks) < 2:
        return
    d = np.diff(ticks)  # (R-1,)
    inside = np.ones(len(d), dtype=bool) if boundary is None else ~boundary[1:]
    back = (d < 0) & inside
    if back.any():
        i = int(np.argmax(back)) + 1
        fix = "df.sort_index()" if name == "index" else f"df.sort_values({name!r})"
        raise DataError(f"time {name!r} is not sorted: row {row_label(i)!r} ({fmt_time(labels[i])}) comes after "
                        f"{fmt_time(labels[i - 1])}{_in_group(group_of, i)}; sort the frame first, e.g. {fix}")
    same = (d == 0) & inside
    if same.any():
        i = int(np.argmax(same)) + 1
        raise DataError(f"time {name!r} has {int(same.sum())} duplicated timestamp(s); the first is "
                        f"{fmt_time(labels[i])} at row {row_label(i)!r}{_in_group(group_of, i)}; keep one row per time "
                        "(df.drop_duplicates) or aggregate them (groupby(...).mean())")


def _in_group(group_of, i) -> str:
    return "" if group_of is None else f" (group {group_of(i)!r})"


def resolve_season(season, labels, ticks, boundary, row_label) -> Tuple[Optional[int], str]:
    """Season length from the time step when ``season`` is "auto"; returns (season, how)."""
    if season != "auto":
        return season, "given"
    if ticks is None or ticks.dtype != np.int64:
        return None, "no calendar time"
    d = np.diff(ticks)
    if boundary is not None:
        d = d[~boundary[1:]]
    if len(d) == 0:
        return None, "one row per sequence"
    if bool(np.all(d == d[0])):
        s = SEASON_BY_STEP.get(int(d[0]))
        return s, "step " + str(pd.Timedelta(int(d[0]), "ns"))
    months = labels.astype("datetime64[M]")
    md = np.diff(months.astype(np.int64))
    if boundary is not None:
        md = md[~boundary[1:]]
    if md.size and np.all(md == md[0]) and int(md[0]) in (1, 3, 12):
        offset = ticks - months.astype("datetime64[ns]").view(np.int64)
        last_day = (labels.astype("datetime64[D]") + np.timedelta64(1, "D")).astype("datetime64[M]") != months
        if np.all(offset == offset[0]) or np.all(last_day):
            return {1: 12, 3: 4, 12: None}[int(md[0])], {1: "monthly", 3: "quarterly", 12: "yearly"}[int(md[0])]
    steps, n = np.unique(d, return_counts=True)
    usual = steps[np.argmax(n)]
    full_d = np.diff(ticks)
    bad = full_d != usual
    if boundary is not None:
        bad &= ~boundary[1:]
    i = int(np.argmax(bad)) + 1
    raise DataError(f"the time step is irregular: at {fmt_time(labels[i])} (row {row_label(i)!r}) the step is "
                    f"{pd.Timedelta(int(full_d[i - 1]), 'ns')}, while most steps are {pd.Timedelta(int(usual), 'ns')}; "
                    "`season`='auto' cannot read a season from an irregular step: set `season` to a whole "
                    "number of steps or None (and resample to a regular grid if the steps should be equal)")


_LARGEST = 1e150  # |value| above this: its square is near float64's limit (1.8e308)


def check_finite(v: np.ndarray, name: str, policy: str, row_label, time_label) -> int:
    """Refuse inf always and NaN under the "error" policy; return the NaN count."""
    inf = np.isinf(v)
    if inf.any():
        i = int(np.argmax(inf))
        raise DataError(f"column {name!r} holds {int(inf.sum())} infinite value(s), first at row "
                        f"{row_label(i)!r}{time_label(i)}; replace them (for example with NaN and a "
                        "`missing` policy) before prepare()")
    # Squares of larger values overflow float64 in the scaler, the metrics and the
    # linear baseline; refuse them here, where the column can still be named.
    big = np.abs(v) > _LARGEST
    if big.any():
        i = int(np.argmax(big))
        raise DataError(f"column {name!r} holds {int(big.sum())} value(s) beyond {_LARGEST:.0e} in size, "
                        f"first at row {row_label(i)!r}{time_label(i)} (={float(v[i]):.3g}); their "
                        "squares overflow: rescale the column (divide it by a power of ten) first")
    nan = np.isnan(v)
    n = int(nan.sum())
    if n == len(v):
        raise DataError(f"column {name!r} holds no value at all (all {n} rows are NaN); leave it out "
                        "(`features`/`target`) or fill it")
    if n and policy == "error":
        i = int(np.argmax(nan))
        raise DataError(f"column {name!r} has {n} missing value(s) (NaN), first at row {row_label(i)!r}"
                        f"{time_label(i)}; fill them yourself or set `missing`='ffill' or 'interpolate'")
    return n


def fill_missing(v: np.ndarray, policy: str, starts: np.ndarray, coord: Optional[np.ndarray]) -> np.ndarray:
    """A filled copy of ``v (R,)``: forward fill or linear interpolation inside each sequence.

    Leading NaNs of a sequence stay NaN (nothing before them to fill from);
    trailing NaNs under "interpolate" hold the last value.

    Args:
        starts: (G,) int64 first row of each sequence (``[0]`` for one series).
        coord: (R,) float64 position used by "interpolate" (time, else row number).
    """
    r = len(v)
    idx = np.arange(r, dtype=np.int64)
    valid = ~np.isnan(v)
    prev = np.where(valid, idx, -1)
    prev[starts] = starts  # a barrier: never fill across the start of a sequence
    prev = np.maximum.accumulate(prev)  # (R,) last valid row at or before
    filled = v[prev]
    if policy == "ffill":
        return filled
    nxt = np.where(valid, idx, r)
    nxt = np.minimum.accumulate(nxt[::-1])[::-1]  # (R,) next valid row at or after, r if none
    has_next = (nxt < r) & (~valid) & ~np.isnan(filled)
    # nxt may lie in a later sequence (no valid row left in this one): then hold the last value
    seq = np.searchsorted(starts, idx, side="right") - 1
    nxt_c = np.minimum(nxt, r - 1)
    has_next &= seq[nxt_c] == seq
    x = coord if coord is not None else idx.astype(np.float64)
    w = np.zeros(r, dtype=np.float64)
    den = x[nxt_c] - x[prev]
    np.divide(x - x[prev], den, out=w, where=has_next & (den != 0))
    return np.where(has_next, filled + w * (v[nxt_c] - filled), filled)
