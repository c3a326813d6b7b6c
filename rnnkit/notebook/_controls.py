"""The panel's input controls: built from a frame, read into a Config, set from one.

Plain functions over a dict of stock ipywidgets, so that the wiring in
``_panel.py`` and the tests speak of controls by name (``controls["hidden"]``).
A control never holds state of its own beyond its ``.value``.
"""
from __future__ import annotations

import math

import ipywidgets as widgets
import pandas as pd

from ..data._config import ACTIVATIONS, INITS, MISSING, MODES, OPTIMIZERS, TASKS, Config

_LABEL = {"description_width": "96px"}
_WIDE = dict(width="auto")  # fill the column, margins included (100% would overflow it)


def _style(w: widgets.Widget, name: str) -> widgets.Widget:
    """Give a control its CSS class (``rnnkit-<name>``) so the browser test can find it."""
    w.add_class("rnnkit-" + name.replace("_", "-"))
    return w


def _dropdown(description, options, value, name):
    return _style(widgets.Dropdown(description=description, options=options, value=value,
                                   style=_LABEL, layout=widgets.Layout(**_WIDE)), name)


def _int(description, value, lo, hi, name):
    return _style(widgets.BoundedIntText(description=description, value=value, min=lo, max=hi,
                                         style=_LABEL, layout=widgets.Layout(**_WIDE)), name)


# The "no column" choice of a dropdown. Not None: a Dropdown shows None as a
# blank box (no selection). Config refuses "" as a column name, so it is free.
NONE = ""


def _shown(v):
    return NONE if v is None else v


def _meant(v):
    return None if v == NONE else v


def _column_options(names, none_label, current):
    """(label, value) pairs for a column dropdown; ``NONE`` stands for `none_label`."""
    opts = [(none_label, NONE)] + [(c, c) for c in names]
    if isinstance(current, tuple) and len(current) > 1:
        opts.append((", ".join(current), current))  # several targets: offered as one choice
    elif isinstance(current, tuple):
        current = current[0]
    if current is not None and current not in names and not isinstance(current, tuple):
        opts.append((f"{current} (not in frame)", current))  # keep a loaded name visible
    return opts


def build_controls(df: pd.DataFrame, config: Config) -> dict:
    """Every input control of the panel, keyed by name, set to `config`.

    Args:
        df: the user's frame; only its column names and index type are read.
        config: the starting values.

    Returns:
        dict name -> widget. Config fields use their own names (``window``,
        ``hidden``, ``lr``...); the rest: ``window_full``, ``sweep_windows``,
        ``sweep_hidden``, ``sweep_activations``, ``sweep_seeds``, ``path``.
    """
    names = [c for c in df.columns if isinstance(c, str)]
    c = {}
    # --- data ---
    c["target"] = _dropdown("target", _column_options(names, "(first numeric)", None), NONE,
                            "target")
    c["features"] = _style(widgets.SelectMultiple(
        description="inputs", options=names, rows=min(5, max(2, len(names))),
        style=_LABEL, layout=widgets.Layout(**_WIDE)), "features")
    c["task"] = _dropdown("task", TASKS, config.task, "task")
    c["mode"] = _dropdown("loss at", MODES, config.mode, "mode")
    c["time_column"] = _dropdown("time column", _column_options(names, "(index)", None), NONE,
                                 "time_column")
    c["group_column"] = _dropdown("sequence id", _column_options(names, "(one series)", None),
                                  NONE, "group_column")
    c["missing"] = _dropdown("gaps (NaN)", MISSING, config.missing, "missing")
    # The time column only matters when the index does not carry time already.
    if isinstance(df.index, pd.DatetimeIndex) and config.time_column is None:
        c["time_column"].layout.display = "none"
    # --- network ---
    c["window"] = _int("window", 24, 1, 100_000, "window")
    c["window_full"] = _style(widgets.Checkbox(description="whole sequences", indent=False),
                              "window_full")
    c["horizon"] = _int("horizon", config.horizon, 0, 100_000, "horizon")
    c["hidden"] = _int("hidden units", config.hidden, 1, 4096, "hidden")
    c["activation"] = _dropdown("activation", ACTIVATIONS, config.activation, "activation")
    c["init"] = _dropdown("init", INITS, config.init, "init")
    # --- training ---
    c["optimizer"] = _dropdown("optimizer", OPTIMIZERS, config.optimizer, "optimizer")
    c["lr"] = _style(widgets.FloatLogSlider(
        description="learning rate", value=config.lr, base=10, min=-5, max=0, step=0.05,
        readout_format=".1e", style=_LABEL, layout=widgets.Layout(**_WIDE)), "lr")
    c["epochs"] = _int("epochs", config.epochs, 1, 100_000, "epochs")
    c["batch_size"] = _int("batch size", config.batch_size, 1, 65_536, "batch_size")
    c["clip"] = _style(widgets.BoundedFloatText(
        description="clip norm", value=0.0, min=0.0, max=1e6, step=0.5,
        tooltip="global gradient-norm clip; 0 turns clipping off",
        style=_LABEL, layout=widgets.Layout(**_WIDE)), "clip")
    c["seed"] = _int("seed", config.seed, 0, 2**31 - 1, "seed")
    # --- sweep ---
    c["sweep_windows"] = _style(widgets.Text(description="windows", value="12, 24, 48",
                                             style=_LABEL, layout=widgets.Layout(**_WIDE)),
                                "sweep_windows")
    c["sweep_hidden"] = _style(widgets.Text(description="hidden units", value="8, 16, 32",
                                            style=_LABEL, layout=widgets.Layout(**_WIDE)),
                               "sweep_hidden")
    c["sweep_activations"] = _style(widgets.SelectMultiple(
        description="activations", options=ACTIVATIONS, value=("tanh", "relu"), rows=4,
        style=_LABEL, layout=widgets.Layout(**_WIDE)), "sweep_activations")
    c["sweep_seeds"] = _int("seeds each", 2, 1, 100, "sweep_seeds")
    # --- config file ---
    c["path"] = _style(widgets.Text(description="JSON file", value="rnnkit_config.json",
                                    placeholder="path/to/config.json",
                                    style=_LABEL, layout=widgets.Layout(**_WIDE)), "path")
    write_config(c, config)
    return c


def write_config(c: dict, config: Config) -> None:
    """Set every control that mirrors a Config field to the value in `config`."""
    names = list(c["features"].options)  # the frame's column names
    c["target"].options = _column_options(names, "(first numeric)", config.target)
    one = isinstance(config.target, tuple) and len(config.target) == 1
    c["target"].value = config.target[0] if one else _shown(config.target)
    c["features"].value = tuple(f for f in (config.features or ()) if f in c["features"].options)
    for field in ("time_column", "group_column"):
        cur = getattr(config, field)
        none_label = c[field].options[0][0]
        c[field].options = _column_options(names, none_label, cur)
        c[field].value = _shown(cur)
    if config.time_column is not None:
        c["time_column"].layout.display = None
    for field in ("task", "mode", "missing", "activation", "init", "optimizer",
                  "horizon", "hidden", "epochs", "batch_size", "seed"):
        c[field].value = getattr(config, field)
    c["lr"].value = config.lr
    c["window_full"].value = config.window == "full"
    if config.window != "full":
        c["window"].value = config.window
    c["clip"].value = 0.0 if config.clip is None else float(config.clip)


def read_config(c: dict, base: Config) -> Config:
    """The Config the controls describe; fields without a control come from `base`.

    Raises:
        ValueError / TypeError from Config's own checks, naming the field.
    """
    features = tuple(c["features"].value) or None
    window = "full" if c["window_full"].value else int(c["window"].value)
    return base.replace(
        target=_meant(c["target"].value), features=features, task=c["task"].value,
        mode=c["mode"].value, time_column=_meant(c["time_column"].value),
        group_column=_meant(c["group_column"].value), missing=c["missing"].value,
        window=window, horizon=int(c["horizon"].value), hidden=int(c["hidden"].value),
        activation=c["activation"].value, init=c["init"].value,
        optimizer=c["optimizer"].value, lr=read_lr(c["lr"], base.lr),
        epochs=int(c["epochs"].value), batch_size=int(c["batch_size"].value),
        clip=float(c["clip"].value) or None, seed=int(c["seed"].value))


def read_lr(slider: widgets.FloatLogSlider, start: float) -> float:
    """The learning rate the slider means.

    The browser snaps the slider to its grid (10**(min + k*step)), so 5e-3 comes
    back as 0.0050119. Within half a step of the start value the start value is
    meant; elsewhere the two significant digits the readout shows.
    """
    v = float(slider.value)
    if v > 0 and start > 0 and abs(math.log10(v) - math.log10(start)) <= slider.step / 2 + 1e-9:
        return float(start)
    return float(f"{v:.2g}")


def _whole_numbers(text: str, label: str, allow_full: bool = False) -> list:
    """Parse '12, 24, 48' into [12, 24, 48]; a ValueError names the box and the fix."""
    out = []
    for part in text.replace(";", ",").split(","):
        part = part.strip()
        if not part:
            continue
        if allow_full and part == "full":
            out.append("full")
        elif part.isdigit() and int(part) >= 1:
            out.append(int(part))
        else:
            extra = " or 'full'" if allow_full else ""
            raise ValueError(f"sweep {label} (={text!r}): {part!r} is not a whole number >= 1{extra}; "
                             f"write values separated by commas, for example '12, 24, 48'")
    if not out:
        raise ValueError(f"sweep {label} is empty; write at least one value, for example '24'")
    return list(dict.fromkeys(out))  # keep order, drop repeats


def read_space(c: dict) -> tuple:
    """The sweep the controls describe: ({"window": [...], "hidden": [...], "activation": [...]}, seeds)."""
    acts = list(c["sweep_activations"].value)
    if not acts:
        raise ValueError("sweep activations: none chosen; pick at least one (ctrl-click for several)")
    space = {"window": _whole_numbers(c["sweep_windows"].value, "windows", allow_full=True),
             "hidden": _whole_numbers(c["sweep_hidden"].value, "hidden units"),
             "activation": acts}
    return space, int(c["sweep_seeds"].value)
