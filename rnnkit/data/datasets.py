"""Demo data: two invented scenarios, generated on the spot (no downloads).

Both generators are deterministic for a given ``seed`` (one
``numpy.random.Generator`` each) and return a fresh DataFrame.

``cold_storage_load``
    Hourly electricity load of an invented cold-storage warehouse (a freezer
    store kept far below zero). A regression / forecasting demo::

        df = datasets.cold_storage_load()
        cfg = Config(target="load_kw", window=48, missing="interpolate")

``packaging_line_faults``
    Sensor traces of an invented packaging line, one short sequence per
    machine cycle, with fault labels per step and per cycle. A sequence
    classification demo (whole cycle, or every step)::

        df = datasets.packaging_line_faults()
        cfg = datasets.suggested_config("packaging_line_faults")

``describe(name)`` prints what each column means and its unit.
"""
from __future__ import annotations

import inspect
from typing import Tuple

import numpy as np
import pandas as pd

from ._config import Config

__all__ = ["cold_storage_load", "packaging_line_faults", "describe", "suggested_config",
           "names", "CLOSED_DAYS", "CONDITIONS"]

# The warehouse's own closing days (month, day): stock-take, a maintenance
# weekend's Monday, summer plant service, year end. Invented, not a calendar.
CLOSED_DAYS: Tuple[Tuple[int, int], ...] = ((1, 1), (3, 13), (6, 5), (8, 7), (8, 8),
                                            (11, 20), (12, 25), (12, 26))
# Fault labels in order of severity; a cycle's label is its worst step label.
CONDITIONS: Tuple[str, ...] = ("normal", "belt_slip", "bearing_wear")
PACKAGING_CHANNELS: Tuple[str, ...] = ("vibration_x", "vibration_y", "motor_current_a")

_START = pd.Timestamp("2023-01-02 00:00")  # a Monday, so weeks line up with the index
_HOURS_PER_YEAR = 8760
_MISSING_PER_YEAR = 4
# Mean door openings per hour by hour of day: inbound deliveries in the
# morning, outbound dispatch in the afternoon. Saturday runs a half shift.
_DOORS_WEEKDAY = np.array([0, 0, 0, 0, 0, 0, 4, 9, 11, 10, 7, 5,
                           4, 5, 8, 11, 12, 10, 7, 5, 3, 2, 0, 0], dtype=np.float64)
_DOORS_SATURDAY = np.array([0, 0, 0, 0, 0, 0, 3, 6, 7, 6, 5, 4,
                            3, 2, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0], dtype=np.float64)


def _ar1(rng: np.random.Generator, n: int, phi: float, sd: float) -> np.ndarray:
    """Stationary AR(1) noise x_t = phi x_{t-1} + e_t, e_t ~ N(0, sd^2).  # (n,)"""
    e = rng.normal(0.0, sd, size=n)
    x = np.empty(n, dtype=np.float64)
    x[0] = e[0] / np.sqrt(1.0 - phi * phi)  # start in the stationary law
    for t in range(1, n):
        x[t] = phi * x[t - 1] + e[t]
    return x


def _smooth(x: np.ndarray, keep: float) -> np.ndarray:
    """First-order lag y_t = keep * y_{t-1} + (1 - keep) * x_t (a slow envelope)."""
    y = np.empty_like(x)
    y[0] = x[0]
    for t in range(1, len(x)):
        y[t] = keep * y[t - 1] + (1.0 - keep) * x[t]
    return y


def cold_storage_load(*, years: float = 2.0, seed: int = 0) -> pd.DataFrame:
    """Hourly electricity load of an invented cold-storage warehouse.

    The load is compressor work (rising with a lagged outdoor temperature),
    heat let in through the loading doors (each opening adds load that
    decays over a few hours), lights and forklifts in working hours
    (Mon-Fri 06-22, Sat 06-14), forklift battery charging after the shift,
    two defrost heater hours a day, slow process noise and sensor noise.
    On Sundays and on the ``CLOSED_DAYS`` the doors stay shut.

    A handful of scattered single readings of ``load_kw`` are missing (NaN),
    as from a meter that dropped a message: about four per year, never two
    in a row and never in the first or last 48 hours. rnnkit's default
    ``missing="error"`` refuses them (and names the rows);
    ``missing="interpolate"`` fills them from their neighbours.

    Args:
        years: length in years of 365 days (hourly rows = round(years * 8760));
            at least one week.
        seed: seed of the random generator; the same seed gives the same frame.

    Returns:
        DataFrame (R, 3) with a DatetimeIndex named "time" (freq "h"):
        ``load_kw`` float64 (kW, the target; a few NaN), ``outdoor_temp_c``
        float64 (deg C), ``doors_open`` int64 (door openings in the hour).
        Suggested: ``Config(target="load_kw", window=48, missing="interpolate")``.
    """
    if isinstance(years, bool) or not isinstance(years, (int, float)) or not np.isfinite(years):
        raise TypeError(f"`years` (={years!r}) must be a number of years, for example 2.0")
    n = int(round(years * _HOURS_PER_YEAR))
    if n < 168:
        raise ValueError(f"`years` (={years!r}) gives {n} hourly rows; use at least one week "
                         f"(years >= {168 / _HOURS_PER_YEAR:.4f}) so that the weekly cycle shows")
    rng = np.random.default_rng(seed)
    time = pd.date_range(_START, periods=n, freq="h", name="time")
    hour = time.hour.to_numpy()  # (R,)
    weekday = time.dayofweek.to_numpy()  # (R,) 0 = Monday
    month_day = list(zip(time.month, time.day))
    closed = np.array([md in CLOSED_DAYS for md in month_day]) | (weekday == 6)  # (R,)
    saturday = (weekday == 5) & ~closed

    # 1. Outdoor temperature: seasons, a day-night swing larger in summer,
    #    and weather spells lasting a few days.
    day_of_year = (time.dayofyear.to_numpy() - 1) + hour / 24.0
    season = -np.cos(2 * np.pi * (day_of_year - 20.0) / 365.25)  # -1 late January, +1 late July
    daily = np.cos(2 * np.pi * (hour - 15.0) / 24.0)  # warmest at 15:00
    temp = 10.5 + 9.5 * season + (3.5 + 1.5 * season) * daily + _ar1(rng, n, 0.99, 0.4)

    # 2. Door openings: Poisson counts around the hour-of-day profile.
    rate = np.where(saturday, _DOORS_SATURDAY[hour], _DOORS_WEEKDAY[hour])
    rate = np.where(closed, 0.0, rate)
    doors = rng.poisson(rate).astype(np.int64)  # (R,)

    # 3. Load in kW. The building envelope lags the weather by hours, and the
    #    warm air let in by a door takes the compressors a few hours to remove.
    temp_felt = _smooth(temp, 0.8)
    compressor = 95.0 + 4.2 * temp_felt + 0.06 * temp_felt ** 2
    infiltration = 3.5 * _smooth(doors.astype(np.float64), 0.5) / 0.5
    staffed = ~closed & (hour >= 6) & np.where(saturday, hour < 14, hour < 22)  # (R,)
    # Forklift batteries charge for six hours after a full weekday shift.
    weekday_shift = np.concatenate([np.zeros(8, dtype=bool), (staffed & ~saturday)[:-8]])
    charging = ((hour >= 22) | (hour < 4)) & weekday_shift
    defrost = (hour == 3) | (hour == 15)
    load = (38.0 + compressor + infiltration + 30.0 * staffed + 18.0 * charging
            + 12.0 * defrost + _ar1(rng, n, 0.7, 3.0) + rng.normal(0.0, 1.5, size=n))

    # 4. A few dropped meter readings.
    candidates = np.arange(48, n - 48, 5)  # stride 5: never two missing in a row
    n_missing = min(len(candidates), max(2, int(round(_MISSING_PER_YEAR * years))))
    missing = np.sort(rng.choice(candidates, size=n_missing, replace=False))
    load = np.round(load, 1)
    load[missing] = np.nan

    df = pd.DataFrame({"load_kw": load, "outdoor_temp_c": np.round(temp, 1),
                       "doors_open": doors}, index=time)
    df.index.freq = "h"
    return df


def _one_cycle(rng: np.random.Generator, length: int, condition: str):
    """Channels and step labels of one machine cycle.

    Returns vib_x, vib_y, current (each (L,) float64) and labels (L,) str.
    """
    t = np.arange(length, dtype=np.float64)  # (L,)
    frac = t / length
    # Belt speed over a cycle: run-up, steady feed, slow sealing press, run-out.
    speed = np.clip(t / 8.0, 0.0, 1.0) * np.where((frac > 0.6) & (frac < 0.75), 0.6, 1.0)
    press = ((frac > 0.6) & (frac < 0.75)).astype(np.float64)
    onset = length if condition == "normal" else int(rng.integers(0, int(0.6 * length)))
    after = t >= onset  # (L,) fault present
    labels = np.where(after, condition, "normal")

    current = 1.2 + 2.6 * speed + 0.7 * press
    if condition == "belt_slip":
        # The belt loosens: the motor is partly unloaded, and short slips
        # (2-4 steps) drop current and speed; the speed jitters.
        slip = np.zeros(length, dtype=bool)
        for s in np.flatnonzero(after & (rng.random(length) < 0.15)):
            slip[s:s + int(rng.integers(2, 5))] = True
        jitter = 1.0 + 0.12 * _ar1(rng, length, 0.5, 0.8)
        speed = np.where(after, speed * jitter * np.where(slip, 0.7, 1.0), speed)
        current = current - after * (0.25 + 0.9 * slip)
    phase = np.cumsum(2 * np.pi / 6.0 * speed)  # shaft turns about once per 6 steps
    vib_x = 0.25 * speed * np.sin(phase)
    vib_y = 0.20 * speed * np.cos(phase)
    if condition == "bearing_wear":
        # A worn bearing rings near the top of the measured band, louder as
        # the cycle goes on; friction draws a little more current.
        grow = np.where(after, (t - onset) / max(1, length - onset), 0.0)
        amp = after * (0.08 + 0.35 * grow)
        ring = 2 * np.pi * 0.42 * t + rng.uniform(0, 2 * np.pi)
        vib_x = vib_x + amp * np.sin(ring)
        vib_y = vib_y + 0.8 * amp * np.sin(ring + 1.3)
        current = current + 0.15 * grow
    vib_x = vib_x + rng.normal(0.0, 0.04, size=length)
    vib_y = vib_y + rng.normal(0.0, 0.04, size=length)
    current = current + rng.normal(0.0, 0.05, size=length)
    return vib_x, vib_y, current, labels


def packaging_line_faults(*, n_cycles: int = 120, steps: Tuple[int, int] = (60, 100),
                          seed: int = 0) -> pd.DataFrame:
    """Sensor traces of an invented packaging line, one sequence per machine cycle.

    Each cycle (one pack wrapped and sealed) runs up the belt, feeds, slows
    for the sealing press and runs out. About half the cycles are normal; in
    the rest a fault starts at a random step in the first 60% of the cycle
    and lasts to its end:

    - ``belt_slip``: motor current drops (the motor is partly unloaded), with
      short deeper drops during slips, and the shaft speed jitters (seen as
      an irregular vibration period).
    - ``bearing_wear``: a high-frequency vibration component (0.42 cycles per
      step) whose amplitude grows over the rest of the cycle; slightly more
      current from friction.

    Args:
        n_cycles: number of cycles (>= 3, so that every condition occurs).
        steps: (shortest, longest) cycle length in steps, both inclusive.
        seed: seed of the random generator.

    Returns:
        Long-format DataFrame, one row per step, sorted by cycle then step:
        ``cycle`` int64 (sequence id 0..n_cycles-1), ``step`` int64 (0..L-1),
        ``vibration_x``, ``vibration_y`` float64 (g), ``motor_current_a``
        float64 (A), ``condition`` str (per step: one of ``CONDITIONS``),
        ``cycle_condition`` str (the worst condition of the cycle, constant
        within it). See ``suggested_config``.
    """
    if isinstance(n_cycles, bool) or not isinstance(n_cycles, (int, np.integer)) or n_cycles < 3:
        raise ValueError(f"`n_cycles` (={n_cycles!r}) must be a whole number >= 3 so that "
                         "every condition occurs")
    if (not isinstance(steps, (tuple, list)) or len(steps) != 2
            or not all(isinstance(s, (int, np.integer)) and not isinstance(s, bool) for s in steps)
            or not 10 <= steps[0] <= steps[1]):
        raise ValueError(f"`steps` (={steps!r}) must be (shortest, longest) whole numbers with "
                         "10 <= shortest <= longest, for example (60, 100)")
    rng = np.random.default_rng(seed)
    # Half normal, a quarter of each fault; the pattern starts with all three
    # so that any n_cycles >= 3 has every condition.
    pattern = ["normal", "belt_slip", "bearing_wear", "normal"]
    conditions = np.array([pattern[i % 4] for i in range(n_cycles)])
    rng.shuffle(conditions)
    lengths = rng.integers(steps[0], steps[1] + 1, size=n_cycles)

    parts = []
    for cycle, (cond, length) in enumerate(zip(conditions, lengths)):
        vx, vy, cur, labels = _one_cycle(rng, int(length), str(cond))
        parts.append(pd.DataFrame({
            "cycle": np.full(length, cycle, dtype=np.int64),
            "step": np.arange(length, dtype=np.int64),
            "vibration_x": np.round(vx, 4), "vibration_y": np.round(vy, 4),
            "motor_current_a": np.round(cur, 3),
            "condition": labels.astype(object), "cycle_condition": str(cond)}))
    return pd.concat(parts, ignore_index=True)


_TEXT = {
    "cold_storage_load": cold_storage_load.__doc__,
    "packaging_line_faults": packaging_line_faults.__doc__,
}


def names() -> Tuple[str, ...]:
    """Names of the demo scenarios."""
    return tuple(_TEXT)


def describe(name: str) -> str:
    """What a demo scenario is: its story, columns, units and a fitting Config.

    Args:
        name: one of ``names()``.

    Returns:
        The description as text (print it).
    """
    if name not in _TEXT:
        raise ValueError(f"`name` (={name!r}) is not a demo scenario; use one of {list(_TEXT)}")
    text = inspect.cleandoc(_TEXT[name])
    return f"{name}\n\n{text}\n\nSuggested config:\n{suggested_config(name).to_json()}"


def suggested_config(name: str, *, per_step: bool = False) -> Config:
    """A Config that suits a demo scenario (a starting point for a sweep).

    Args:
        name: one of ``names()``.
        per_step: packaging line only: label every step (many-to-many on
            ``condition``) instead of each whole cycle (many-to-one on
            ``cycle_condition``).

    Returns:
        Config.
    """
    if name == "cold_storage_load":
        if per_step:
            raise ValueError("`per_step`=True is for 'packaging_line_faults'; the load "
                             "scenario is a forecast, leave `per_step` False")
        return Config(target="load_kw", window=48, horizon=1, hidden=32,
                      missing="interpolate", season=24)
    if name == "packaging_line_faults":
        channels = PACKAGING_CHANNELS
        if per_step:
            return Config(target="condition", features=channels, task="classification",
                          mode="many-to-many", group_column="cycle", window=20, horizon=0,
                          hidden=32, season=None)
        return Config(target="cycle_condition", features=channels, task="classification",
                      mode="many-to-one", group_column="cycle", window="full", horizon=0,
                      hidden=32, season=None)
    raise ValueError(f"`name` (={name!r}) is not a demo scenario; use one of {list(_TEXT)}")
