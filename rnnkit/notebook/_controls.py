"""The panel's input controls: built from a frame, read into a Config, set from one.

Plain functions over a dict of stock ipywidgets, so that the wiring in
``_panel.py`` and the tests speak of controls by name (``controls["hidden"]``).
A control never holds state of its own beyond its ``.value``.
"""
from __future__ import annotations

import dataclasses
import math

import ipywidgets as widgets
import numpy as np
import pandas as pd

from ..data._config import ACTIVATIONS, INITS, MISSING, MODES, OPTIMIZERS, TASKS, Config
from ..recurrent import _names

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


def _paired(slider: widgets.Widget, name: str, typed: widgets.Widget, c: dict) -> None:
    """Put `slider` in ``c[name]`` and a box for a typed value beside it in ``c[name + '_value']``.

    The two follow each other; a typed value past the slider's end widens the
    slider (a window of 500 stays 500, not the slider's top).
    """
    _style(slider, name)
    _style(typed, name + "_value")
    slider.readout = False
    slider.layout = widgets.Layout(width="auto", flex="1 1 auto")
    typed.layout = widgets.Layout(width="78px")
    busy = []

    def to_typed(change):
        if not busy:
            busy.append(1)
            try:
                typed.value = _typed_of(slider)
            finally:
                busy.clear()

    def to_slider(change):
        if busy:
            return
        busy.append(1)
        try:
            v = change["new"]
            if isinstance(slider, widgets.FloatLogSlider):
                if v > 0:
                    e = math.log10(v)
                    slider.min, slider.max = min(slider.min, math.floor(e)), max(slider.max, math.ceil(e))
                    slider.value = v
            else:
                if v > slider.max:
                    slider.max = v
                slider.value = max(v, slider.min)
        finally:
            busy.clear()
        # What the slider ended on (an observer may have moved it on, e.g. onto a sweep's grid).
        typed.value = _typed_of(slider)

    slider.observe(to_typed, names="value")
    typed.observe(to_slider, names="value")
    typed.value = _typed_of(slider)
    c[name] = slider
    c[name + "_value"] = typed


def _typed_of(slider):
    if isinstance(slider, widgets.FloatLogSlider):
        return float(f"{slider.value:.2g}")
    return int(slider.value)


def pair_box(c: dict, name: str) -> widgets.HBox:
    """The slider `name` with its typed value beside it, as one row."""
    return widgets.HBox([c[name], c[name + "_value"]], layout=widgets.Layout(width="auto"))


# Fields a sweep can vary from the grid tab, with how their values are spaced.
RANGES = {"window": "linear", "hidden": "log", "lr": "log"}


def spaced(lo: float, hi: float, n: int, spacing: str, whole: bool) -> list:
    """`n` values from `lo` to `hi`, evenly spaced (or evenly on a log scale); whole numbers
    rounded and repeats dropped. One value: `lo`."""
    n = int(n)
    if n <= 1 or hi <= lo:
        values = [lo]
    elif spacing == "log":
        values = list(np.geomspace(lo, hi, n))
    else:
        values = list(np.linspace(lo, hi, n))
    if whole:
        return list(dict.fromkeys(int(round(v)) for v in values))
    return list(dict.fromkeys(float(f"{v:.2g}") for v in values))


def list_text(values) -> str:
    """'12, 24, 48' (numbers as typed: whole numbers plain, others to 2 significant digits)."""
    return ", ".join(str(v) if isinstance(v, (int, str)) else f"{v:.2g}" for v in values)


def _range_controls(c: dict, key: str, label: str, rng: widgets.Widget, count: int) -> None:
    """A range slider (from, to) and a how-many slider that write the list box ``c[key]``.

    The list box shows the values they give and may be typed into instead
    (the sweep reads the box only).
    """
    field = {"sweep_windows": "window", "sweep_hidden": "hidden", "sweep_lr": "lr"}[key]
    spacing = RANGES[field]
    rng.description = label
    rng.style = _LABEL
    rng.continuous_update = False
    rng.layout = widgets.Layout(width="auto")
    n = widgets.IntSlider(description="how many", value=count, min=1, max=8,
                          continuous_update=False, style=_LABEL, layout=widgets.Layout(width="auto"))
    text = widgets.Text(description="values", style=_LABEL, layout=widgets.Layout(**_WIDE))

    def write(change=None):
        lo, hi = rng.value
        if field == "lr":
            lo, hi = 10.0 ** lo, 10.0 ** hi
        text.value = list_text(spaced(lo, hi, n.value, spacing, whole=field != "lr"))

    rng.observe(write, names="value")
    n.observe(write, names="value")
    write()
    c[key] = _style(text, key)
    c[key + "_range"] = _style(rng, key + "_range")
    c[key + "_count"] = _style(n, key + "_count")


def has_field(name: str) -> bool:
    """Whether Config has the field `name` (the panel offers a control only for fields that exist)."""
    return name in {f.name for f in dataclasses.fields(Config)}


def cell_choices() -> tuple:
    """The recurrent cells Config accepts (empty when Config has no `cell` field)."""
    if not has_field("cell"):
        return ()
    return tuple(getattr(_names, "CELLS", ())) or (Config().cell,)


def build_controls(df: pd.DataFrame, config: Config) -> dict:
    """Every input control of the panel, keyed by name, set to `config`.

    Args:
        df: the user's frame; only its column names, length and index type are read.
        config: the starting values.

    Returns:
        dict name -> widget. Config fields use their own names (``window``,
        ``hidden``, ``lr``... ``cell`` when Config has it); window, hidden,
        epochs and lr are sliders with a typed box beside them
        (``<name>_value``). The rest: ``window_full``; the sweep's list boxes
        ``sweep_windows``, ``sweep_hidden``, ``sweep_lr`` (each written by
        ``<key>_range`` and ``<key>_count`` sliders, or typed),
        ``sweep_activations``, ``sweep_cells`` (with ``cell``), ``sweep_seeds``;
        ``path``.
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
    start_window = config.window if isinstance(config.window, int) else 24
    top = max(48, min(len(df) // 4, 1000), start_window)
    _paired(widgets.IntSlider(description="window", value=start_window, min=1, max=top,
                              continuous_update=False, style=_LABEL),
            "window", widgets.BoundedIntText(min=1, max=100_000), c)
    c["window_full"] = _style(widgets.Checkbox(description="whole sequences", indent=False),
                              "window_full")
    c["horizon"] = _int("horizon", config.horizon, 0, 100_000, "horizon")
    _paired(widgets.IntSlider(description="hidden units", value=config.hidden, min=1,
                              max=max(128, config.hidden), continuous_update=False, style=_LABEL),
            "hidden", widgets.BoundedIntText(min=1, max=4096), c)
    c["activation"] = _dropdown("activation", ACTIVATIONS, config.activation, "activation")
    if has_field("cell"):
        c["cell"] = _dropdown("cell", cell_choices(), config.cell, "cell")
    c["init"] = _dropdown("init", INITS, config.init, "init")
    # --- training ---
    c["optimizer"] = _dropdown("optimizer", OPTIMIZERS, config.optimizer, "optimizer")
    _paired(widgets.FloatLogSlider(description="learning rate", value=config.lr, base=10, min=-5,
                                   max=0, step=0.05, continuous_update=False, style=_LABEL),
            "lr", widgets.BoundedFloatText(min=1e-12, max=1e6, step=None), c)
    _paired(widgets.IntSlider(description="epochs", value=config.epochs, min=1,
                              max=max(200, config.epochs), continuous_update=False, style=_LABEL),
            "epochs", widgets.BoundedIntText(min=1, max=100_000), c)
    c["batch_size"] = _int("batch size", config.batch_size, 1, 65_536, "batch_size")
    c["clip"] = _style(widgets.BoundedFloatText(
        description="clip norm", value=0.0, min=0.0, max=1e6, step=0.5,
        tooltip="global gradient-norm clip; 0 turns clipping off",
        style=_LABEL, layout=widgets.Layout(**_WIDE)), "clip")
    c["seed"] = _int("seed", config.seed, 0, 2**31 - 1, "seed")
    # --- sweep: a range and a count per field, written into a list box that may be typed ---
    w0 = max(2, start_window // 2)
    _range_controls(c, "sweep_windows", "windows", widgets.IntRangeSlider(
        value=(w0, max(w0 + 1, 2 * start_window)), min=1, max=max(top, 2 * start_window)), 3)
    h = config.hidden
    _range_controls(c, "sweep_hidden", "hidden units", widgets.IntRangeSlider(
        value=(max(1, h // 2), max(2, 2 * h)), min=1, max=max(256, 2 * h)), 3)
    e = math.log10(config.lr)
    _range_controls(c, "sweep_lr", "lr, 10^x", widgets.FloatRangeSlider(
        value=(round(e, 2), round(min(e + 1, 0.0), 2)), min=-5.0, max=0.0, step=0.05,
        readout_format=".1f"), 1)

    def follow_lr(change):  # one learning rate in the grid: the model's own
        if c["sweep_lr_count"].value == 1 and change["new"] > 0:
            e = round(math.log10(read_lr(c["lr"], config.lr)), 2)
            lo, hi = c["sweep_lr_range"].value
            c["sweep_lr_range"].value = (max(e, -5.0), max(hi, e))

    c["lr"].observe(follow_lr, names="value")
    c["sweep_activations"] = _style(widgets.SelectMultiple(
        description="activations", options=ACTIVATIONS, value=("tanh", "relu"), rows=4,
        style=_LABEL, layout=widgets.Layout(**_WIDE)), "sweep_activations")
    if has_field("cell"):
        c["sweep_cells"] = _style(widgets.SelectMultiple(
            description="cells", options=cell_choices(), value=(config.cell,),
            rows=min(4, len(cell_choices())), style=_LABEL, layout=widgets.Layout(**_WIDE)),
            "sweep_cells")
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
    for field in ("task", "mode", "missing", "activation", "init", "optimizer", "horizon",
                  "batch_size", "seed") + (("cell",) if "cell" in c else ()):
        c[field].value = getattr(config, field)
    for field in ("hidden", "epochs"):
        set_slider(c[field], getattr(config, field))
    c["lr"].value = config.lr
    c["lr_value"].value = config.lr
    c["window_full"].value = config.window == "full"
    if config.window != "full":
        set_slider(c["window"], config.window)
    c["clip"].value = 0.0 if config.clip is None else float(config.clip)


def set_slider(slider: widgets.Widget, value) -> None:
    """Set an int slider, widening it first when the value lies past its end."""
    if value > slider.max:
        slider.max = value
    slider.value = value


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
        clip=float(c["clip"].value) or None, seed=int(c["seed"].value),
        **({"cell": c["cell"].value} if "cell" in c else {}))


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


def _positive_numbers(text: str, label: str) -> list:
    """Parse '0.001, 0.01' into [0.001, 0.01]; a ValueError names the box and the fix."""
    out = []
    for part in text.replace(";", ",").split(","):
        part = part.strip()
        if not part:
            continue
        try:
            v = float(part)
        except ValueError:
            v = math.nan
        if not (math.isfinite(v) and v > 0):
            raise ValueError(f"sweep {label} (={text!r}): {part!r} is not a number > 0; write "
                             "values separated by commas, for example '0.001, 0.003, 0.01'")
        out.append(v)
    if not out:
        raise ValueError(f"sweep {label} is empty; write at least one value, for example '0.005'")
    return list(dict.fromkeys(out))


def read_space(c: dict) -> tuple:
    """The sweep the controls describe: (space, seeds, base changes).

    space is {"window": [...], "hidden": [...], "activation": [...]} plus
    "lr" when several learning rates are listed and "cell" when several cells
    are picked; a single learning rate or cell is a change of the base Config
    (base changes, a dict) rather than a varied field.
    """
    acts = list(c["sweep_activations"].value)
    if not acts:
        raise ValueError("sweep activations: none chosen; pick at least one (ctrl-click for several)")
    space = {"window": _whole_numbers(c["sweep_windows"].value, "windows", allow_full=True),
             "hidden": _whole_numbers(c["sweep_hidden"].value, "hidden units"),
             "activation": acts}
    base = {}
    lrs = _positive_numbers(c["sweep_lr"].value, "learning rates")
    if len(lrs) > 1:
        space["lr"] = lrs
    else:
        base["lr"] = lrs[0]
    if "sweep_cells" in c:
        cells = list(c["sweep_cells"].value)
        if not cells:
            raise ValueError("sweep cells: none chosen; pick at least one (ctrl-click for several)")
        if len(cells) > 1:
            space["cell"] = cells
        else:
            base["cell"] = cells[0]
    return space, int(c["sweep_seeds"].value), base
