"""The notebook panel: stock ipywidgets laid out and wired to fit, sweep and the config file.

Layout and wiring only. Every number comes from the public functions
(``fit``, ``sweep``, ``save_config``, ``load_config``) and every figure from
``rnnkit.plots`` (through ``_panel_views``). Long work runs in one background
``threading.Thread`` so that the stop button and the progress bar stay live;
ipywidgets 8 syncs values set from that thread.

    >>> w = rnnkit.panel(df, rnnkit.Config(target="load_kw"))   # the widget; display it
    >>> p = w.panel                                             # the Panel behind it
    >>> p.controls["epochs"].value = 3; p.train_button.click(); p.wait()
"""
from __future__ import annotations

import html
import os
import threading
from typing import Callable, Optional

import ipywidgets as widgets
import pandas as pd

from ..data._config import Config
from ..data._errors import DataError
from ..sweeps._export import load_config, save_config
from ..fitting._fit import fit, resolve_config
from ._controls import build_controls, read_config, read_space, write_config
from ._views import FigureViews
from ..sweeps._sweep import sweep

_COLOURS = {"info": "#36454f", "ok": "#1b6e3a", "warn": "#8a5a00", "error": "#b00020"}


def _button(description, style, icon, name, tooltip):
    b = widgets.Button(description=description, button_style=style, icon=icon, tooltip=tooltip,
                       layout=widgets.Layout(width="auto", flex="1 1 auto"))
    b.add_class("rnnkit-" + name)
    return b


def _hint(text):
    return widgets.HTML(f"<div style='color:#777;font-size:11px;margin:0 0 4px 100px;"
                        f"line-height:1.3'>{html.escape(text)}</div>")


def _section(title, children):
    head = widgets.HTML(f"<div style='font-weight:600;color:#555;margin:6px 0 2px'>{title}</div>")
    return [head, *children]


class Panel:
    """The widgets of one panel and the actions behind its buttons.

    Attributes:
        widget: the ipywidgets box to display (``widget.panel`` is this object).
        controls: dict name -> input widget (see ``_panel_controls.build_controls``).
        train_button, sweep_button, stop_button, export_button, load_button: Buttons.
        progress: IntProgress of the running job; status: HTML message area;
            status_level: "info", "ok", "warn" or "error" (the last message's kind).
        views: FigureViews holding every figure and table.
        result: the last FitResult (or None); sweep_result: the last SweepResult.
    """

    def __init__(self, df: pd.DataFrame, config: Optional[Config] = None):
        if not isinstance(df, pd.DataFrame):
            raise TypeError(f"panel(df) needs a pandas DataFrame, got {type(df).__name__}; "
                            "for a Series use series.to_frame()")
        self._df = df  # read only: fit and sweep copy what they change
        self._base = resolve_config(config)  # a Config, a dict of its fields, or None, as fit takes
        self.controls = build_controls(df, self._base)
        self.result = None
        self.sweep_result = None
        self._thread: Optional[threading.Thread] = None
        self._stop = threading.Event()

        self.train_button = _button("Train", "primary", "play", "train",
                                    "fit one network with the settings on the left")
        self.sweep_button = _button("Sweep", "info", "th", "sweep",
                                    "fit every combination of the sweep values, each with several seeds")
        self.stop_button = _button("Stop", "warning", "stop", "stop",
                                   "stop after the current epoch / run; finished runs are kept")
        self.stop_button.disabled = True
        self.export_button = _button("Save JSON", "", "download", "export",
                                     "write the best sweep config (or the current one) to the path")
        self.load_button = _button("Load JSON", "", "upload", "load",
                                   "read a config file into the controls")
        self.progress = widgets.IntProgress(value=0, min=0, max=1, bar_style="",
                                            layout=widgets.Layout(width="100%"))
        self.progress_label = widgets.Label("idle")
        self.status = widgets.HTML(layout=widgets.Layout(min_height="40px", width="100%"))
        self.status.add_class("rnnkit-status")
        self.views = FigureViews()

        self.train_button.on_click(lambda _: self._start_train())
        self.sweep_button.on_click(lambda _: self._start_sweep())
        self.stop_button.on_click(lambda _: self._request_stop())
        self.export_button.on_click(lambda _: self._export())
        self.load_button.on_click(lambda _: self._load())
        self.widget = self._layout(df)
        self.widget.panel = self
        self._say("info", f"{len(df)} rows, columns {', '.join(map(str, df.columns))}. "
                          "Pick a target and press Train.")

    # --- layout ---
    def _layout(self, df):
        c = self.controls
        pages = {
            "Data": _section("what to predict", [c["target"], c["features"], _hint(
                "inputs: none picked = every other numeric column; ctrl-click picks several"),
                c["task"], c["mode"]])
            + _section("rows", [c["time_column"], c["group_column"], c["missing"]]),
            "Model": _section("network", [widgets.HBox([c["window"], c["window_full"]]),
                                          c["horizon"], c["hidden"], c["activation"], c["init"]])
            + _section("training", [c["optimizer"], c["lr"], c["epochs"], c["batch_size"],
                                    c["clip"], c["seed"]]),
            "Sweep": _section("values to try (comma separated)",
                              [c["sweep_windows"], c["sweep_hidden"], c["sweep_activations"],
                               c["sweep_seeds"]]),
        }
        c["window"].layout.width = "52%"
        c["window_full"].layout.width = "48%"
        settings = widgets.Tab(children=[widgets.VBox(v) for v in pages.values()],
                               titles=tuple(pages), selected_index=1)
        actions = widgets.HBox([self.train_button, self.sweep_button, self.stop_button])
        files = widgets.HBox([self.export_button, self.load_button])
        left = widgets.VBox([settings, actions, self.progress, self.progress_label,
                             c["path"], files, self.status],
                            layout=widgets.Layout(width="360px", min_width="360px",
                                                  margin="0 12px 0 0"))
        head = widgets.HTML(
            "<div style='font-size:15px;font-weight:600'>rnnkit &middot; Elman network workbench</div>"
            f"<div style='color:#666'>{len(df)} rows &times; {df.shape[1]} columns, "
            f"index: {html.escape(type(df.index).__name__)}</div>")
        body = widgets.HBox([left, self.views.widget],
                            layout=widgets.Layout(width="100%", align_items="flex-start"))
        box = widgets.VBox([head, body], layout=widgets.Layout(width="100%", padding="4px"))
        box.add_class("rnnkit-panel")
        return box

    # --- the Config the controls describe ---
    def config(self) -> Config:
        """The Config the controls describe (fields without a control come from the start config)."""
        return read_config(self.controls, self._base)

    def wait(self, timeout: Optional[float] = None) -> bool:
        """Wait for the background job; True when none is running any more."""
        t = self._thread
        if t is not None:
            t.join(timeout)
        return t is None or not t.is_alive()

    @property
    def busy(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    # --- status ---
    def _say(self, level: str, text: str) -> None:
        colour = _COLOURS[level]
        body = html.escape(text).replace("\n", "<br>")
        self.status.value = (f"<div style='color:{colour};white-space:normal;line-height:1.35'>"
                             f"{body}</div>")
        self.status_level = level

    # --- background work ---
    def _run(self, label: str, job: Callable[[], None]) -> None:
        """Start `job` in a thread with the buttons locked; errors land in the status area."""
        if self.busy:
            self._say("warn", "A job is running already; press Stop or wait for it.")
            return
        self._stop.clear()
        for b in (self.train_button, self.sweep_button, self.load_button):
            b.disabled = True
        self.stop_button.disabled = False
        self.progress.bar_style = "info"
        self.progress.value = 0
        self.progress_label.value = label

        def work():
            try:
                job()
            except DataError as e:
                self._fail("The data cannot be used as set", e)
            except (ValueError, TypeError) as e:
                self._fail("A setting is not valid", e)
            except Exception as e:  # the panel must survive anything a run throws
                self._fail(f"The run failed ({type(e).__name__})", e)
            finally:
                for b in (self.train_button, self.sweep_button, self.load_button):
                    b.disabled = False
                self.stop_button.disabled = True

        self._thread = threading.Thread(target=work, name="rnnkit-panel", daemon=True)
        self._thread.start()

    def _fail(self, what: str, e: BaseException) -> None:
        self.progress.bar_style = "danger"
        self.progress_label.value = "failed"
        self._say("error", f"{what}: {e}")

    def _request_stop(self) -> None:
        self._stop.set()
        self.progress_label.value = "stopping after the current step..."

    def _checked_config(self) -> Optional[Config]:
        """The controls' Config, or None with the reason in the status area."""
        try:
            return self.config()
        except (ValueError, TypeError) as e:
            self._say("error", f"A setting is not valid: {e}")
            return None

    # --- train ---
    def _start_train(self) -> None:
        cfg = self._checked_config()
        if cfg is None:
            return
        self.progress.max = cfg.epochs
        self._say("info", f"Training {cfg.hidden} {cfg.activation} units, window {cfg.window}, "
                          f"up to {cfg.epochs} epochs...")
        self._run("training", lambda: self._train(cfg))

    def _on_epoch(self, row) -> None:
        epoch = int(row["epoch"])
        self.progress.value = min(epoch, self.progress.max)
        self.progress_label.value = (f"epoch {epoch}/{self.progress.max}  train {row['train_loss']:.4g}"
                                     f"  val {row['val_loss']:.4g}")

    def _train(self, cfg: Config) -> None:
        result = fit(self._df, cfg, progress=False, stop=self._stop, on_epoch=self._on_epoch)
        self.result = result
        self.progress_label.value = "measuring the network and drawing figures..."
        self.views.show_fit(result)
        status = str(result.status)
        if status.startswith("diverged"):
            self.progress.bar_style = "danger"
            self._say("warn", f"The run {status}: the loss became infinite or NaN. Lower the "
                              "learning rate, turn on clipping or pick another init. The "
                              "figures show the last good weights; the curves mark the epoch.")
        else:
            self.progress.bar_style = "success"
            self._say("ok", f"Trained {len(result.history)} epochs ({status}). "
                            f"{self.views.headline(result)}")
        self.progress_label.value = "drawing the loss surface..."
        self.views.show_surfaces(result)
        self.progress_label.value = f"done: {status}"

    # --- sweep ---
    def _start_sweep(self) -> None:
        cfg = self._checked_config()
        if cfg is None:
            return
        try:
            space, seeds = read_space(self.controls)
        except ValueError as e:
            self._say("error", str(e))
            return
        n = seeds
        for values in space.values():
            n *= len(values)
        self.progress.max = n
        self._say("info", f"Sweeping {n} runs ({' x '.join(str(len(v)) for v in space.values())} "
                          f"settings x {seeds} seeds)...")
        self._run("sweeping", lambda: self._sweep(cfg, space, seeds))

    def _on_run(self, row) -> None:
        self.progress.value = min(self.progress.value + 1, self.progress.max)
        self.progress_label.value = f"run {self.progress.value}/{self.progress.max} finished"

    def _sweep(self, cfg: Config, space: dict, seeds: int) -> None:
        result = sweep(self._df, cfg, space, seeds=seeds, workers=1, store=None, progress=False,
                       stop=self._stop, on_run=self._on_run)
        self.sweep_result = result
        self.views.show_sweep(result)
        done = len(result.table)
        if self._stop.is_set():
            self.progress.bar_style = "warning"
            self._say("warn", f"Stopped: {done} of {self.progress.max} runs finished and are kept.")
        else:
            self.progress.bar_style = "success"
            self._say("ok", f"Sweep finished: {done} runs. {self.views.sweep_headline(result)}")
        self.progress_label.value = f"done: {done} runs"

    # --- config file ---
    def _has_winner(self) -> bool:
        r = self.sweep_result
        return r is not None and bool((r.table["status"] != "failed").any())

    def export_config(self) -> Config:
        """The config Save JSON writes: the sweep's winner when there is one, else the controls'."""
        return self.sweep_result.best() if self._has_winner() else self.config()

    def _export(self) -> None:
        path = os.path.expanduser(self.controls["path"].value.strip())
        if not path:
            self._say("error", "JSON file: the path is empty; type where to write, e.g. best.json")
            return
        try:
            if self._has_winner():  # the document then carries the winner's scores too
                self.sweep_result.export(path)
                which = "the best sweep run"
            else:
                save_config(self.config(), path, data=self._df)
                which = "the current settings"
            with open(path, encoding="utf-8") as f:
                text = f.read()
        except (OSError, ValueError, TypeError) as e:
            self._say("error", f"Could not write {path!r}: {e}")
            return
        self.views.show_document(path, text)
        self._say("ok", f"Wrote {which} to {os.path.abspath(path)}.")

    def _load(self) -> None:
        path = os.path.expanduser(self.controls["path"].value.strip())
        try:
            cfg = load_config(path)
            with open(path, encoding="utf-8") as f:
                text = f.read()
        except (OSError, ValueError, TypeError) as e:
            self._say("error", f"Could not load {path!r}: {e}")
            return
        self._base = cfg
        write_config(self.controls, cfg)
        self.views.show_document(path, text)
        self._say("ok", f"Loaded {path} into the controls.")


def panel(df: pd.DataFrame, config: Optional[Config] = None) -> widgets.Widget:
    """An interactive panel to train, diagnose, sweep and export on `df`.

    Args:
        df: the series (one long series, or sequences with a group column).
        config: starting settings; None starts from ``Config()``.

    Returns:
        an ipywidgets VBox; display it (or leave it as the cell's value).
        ``widget.panel`` is the ``Panel`` behind it (controls, buttons, results).
    """
    return Panel(df, config).widget
