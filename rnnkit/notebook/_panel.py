"""The notebook panel: stock ipywidgets laid out and wired to fit, sweep and the config file.

Layout and wiring only. Every number comes from the public functions
(``fit``, ``sweep``, ``SweepResult.result``, ``save_config``, ``load_config``)
and every figure from ``rnnkit.plots`` (through ``_views``). Long work runs in
one background ``threading.Thread`` so that the stop button and the progress
bar stay live; ipywidgets 8 syncs values set from that thread. After a sweep,
the same sliders pick any run of its grid and the figures switch to it, drawn
from the weights the sweep kept (a second thread draws, newest request first).

    >>> w = rnnkit.panel(df, rnnkit.Config(target="load_kw"))   # the widget; display it
    >>> p = w.panel                                             # the Panel behind it
    >>> p.controls["epochs"].value = 3; p.train_button.click(); p.wait()
"""
from __future__ import annotations

import atexit
import html
import os
import threading
import weakref
from typing import Callable, Optional

import ipywidgets as widgets
import numpy as np
import pandas as pd

from ..data._config import Config
from ..data._errors import DataError
from ..fitting._backtest import backtest
from ..fitting._fit import fit, resolve_config
from ..sweeps._export import fingerprint, load_config, save_config
from ..sweeps._plan import plan
from ..sweeps._runner import _fingerprints
from ..sweeps._store import RunStore, run_key
from ..sweeps._sweep import sweep
from ._controls import (RANGES, build_controls, pair_box, read_config, read_lr, read_space,
                        set_slider, write_config)
from ._backtest_view import backtest_view
from ._data import loss_planes
from ._views import FigureViews, caption, plural

_COLOURS = {"info": "#36454f", "ok": "#1b6e3a", "warn": "#8a5a00", "error": "#b00020"}
# The controls a finished sweep's grid is browsed with, by the Config field they set.
BROWSE = ("window", "hidden", "activation", "lr", "cell", "seed")
PHASES = ("compiling", "training", "figures")
EXIT_WAIT = 120.0  # seconds a closing interpreter waits for a panel's job to reach a stop point

# Finished sweep runs per data fingerprint, kept while the kernel lives: a stopped sweep's
# runs are not run again by the next sweep on the same frame.
_STORES: dict = {}
_PANELS: "weakref.WeakSet[Panel]" = weakref.WeakSet()


def run_store(df: pd.DataFrame) -> RunStore:
    """The in-memory run store of this frame's data (one per fingerprint, for the kernel's life)."""
    key = fingerprint(df, None)
    if key not in _STORES:
        _STORES[key] = RunStore(None)
    return _STORES[key]


def _stop_all_panels() -> None:
    """At interpreter exit: stop every panel's job and join its threads.

    A thread still inside a compiled XLA computation when the interpreter
    tears down aborts the process ("FATAL: exception not rethrown"); a joined
    one cannot.
    """
    for p in list(_PANELS):
        p.close(timeout=EXIT_WAIT)


atexit.register(_stop_all_panels)


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


def gaps(df: pd.DataFrame) -> dict:
    """{column: missing values} of the frame's numeric columns that have any."""
    counts = df.select_dtypes("number").isna().sum()
    return {str(k): int(v) for k, v in counts.items() if v > 0}


def stop_reason(result) -> str:
    """Why training ended, in a sentence (empty for a run that used every epoch)."""
    status, cfg = str(result.status), result.config
    if status.startswith("stopped early"):
        return (f"It {status}: the validation loss had not improved for "
                f"{plural(cfg.patience, 'epoch')} (patience), so the weights kept are those of "
                f"epoch {result.best_epoch}.")
    if status.startswith("stopped by user"):
        return f"It was {status}; the weights kept are those of epoch {result.best_epoch}."
    return ""


class Panel:
    """The widgets of one panel and the actions behind its buttons.

    Attributes:
        widget: the ipywidgets box to display (``widget.panel`` is this object).
        controls: dict name -> input widget (see ``_controls.build_controls``).
        train_button, sweep_button, stop_button: Buttons; export_button ("Save settings")
            writes the controls' settings, best_button ("Save sweep winner") the winner.
        load_button: reads a config file into the controls.
        browse: Checkbox; while set (after a sweep), the sliders pick the run shown.
        progress: IntProgress of the running job; phase: HTML naming the job's phase
            (compiling, training, figures); status: HTML message area;
            status_level: "info", "ok", "warn" or "error" (the last message's kind).
        views: FigureViews holding every figure and table.
        result: the FitResult shown (trained, or rebuilt from a sweep run);
            sweep_result: the last SweepResult; shown_run: the sweep run's key shown, or None.
    """

    def __init__(self, df: pd.DataFrame, config: Optional[Config] = None):
        if not isinstance(df, pd.DataFrame):
            raise TypeError(f"panel(df) needs a pandas DataFrame, got {type(df).__name__}; "
                            "for a Series use series.to_frame()")
        self._df = df  # read only: fit and sweep copy what they change
        self._base = resolve_config(config)  # a Config, a dict of its fields, or None, as fit takes
        self.gaps = gaps(df)
        if self.gaps and self._base.missing == "error":
            # The first Train must work: gaps are filled (and the panel says so) unless the user
            # picks "error" where the choice is offered, on the first tab.
            self._base = self._base.replace(missing="interpolate")
        self.controls = build_controls(df, self._base)
        self.result = None
        self.sweep_result = None
        self.shown_run = None
        self.status_level = "info"
        self._thread: Optional[threading.Thread] = None
        self._viewer: Optional[threading.Thread] = None
        self._measurer: Optional[threading.Thread] = None  # diagnostics and surfaces of a new run
        self._view_lock = threading.Lock()
        self._view_request = None
        self._generation = 0  # bumped by every new thing to show; older drawing stops
        self._stop = threading.Event()
        self._closing = False
        self._quiet = False  # True while the panel itself sets controls
        self.phase_now = None  # "compiling", "training", "figures" or None (idle)

        self.train_button = _button("Train", "primary", "play", "train",
                                    "fit one network with the settings on the left")
        self.sweep_button = _button("Sweep", "info", "th", "sweep",
                                    "fit every combination of the grid's values, each with "
                                    "several seeds; finished runs are kept and not run again")
        self.stop_button = _button("Stop", "warning", "stop", "stop",
                                   "stop after the current epoch / run; finished runs are kept")
        self.stop_button.disabled = True
        self.backtest_button = _button("Backtest", "", "history", "backtest",
                                       "score the settings on the left over several forecast "
                                       "origins, with a significance test against each baseline")
        self.folds = widgets.BoundedIntText(value=4, min=2, max=20, description="folds",
                                            style={"description_width": "40px"},
                                            layout=widgets.Layout(width="110px"))
        self.folds.add_class("rnnkit-folds")
        self.backtest_result = None
        self.export_button = _button("Save settings", "", "download", "export",
                                     "write the settings now on the controls to the JSON file")
        self.best_button = _button("Save sweep winner", "", "trophy", "export-best",
                                   "write the best run of the last sweep to the JSON file")
        self.best_button.disabled = True
        self.load_button = _button("Load", "", "upload", "load",
                                   "read a config file into the controls")
        self.browse = widgets.Checkbox(description="sliders pick a sweep run", value=False,
                                       disabled=True, indent=False,
                                       layout=widgets.Layout(width="auto"))
        self.browse.add_class("rnnkit-browse")
        self.progress = widgets.IntProgress(value=0, min=0, max=1, bar_style="",
                                            layout=widgets.Layout(width="100%"))
        self.progress.add_class("rnnkit-progress")
        self.phase = widgets.HTML(self._phase_html(None))
        self.phase.add_class("rnnkit-phase")
        self.progress_label = widgets.Label("idle")
        self.progress_label.add_class("rnnkit-progress-label")
        self.status = widgets.HTML(layout=widgets.Layout(min_height="40px", width="100%"))
        self.status.add_class("rnnkit-status")
        self.views = FigureViews()

        self.train_button.on_click(lambda _: self._start_train())
        self.sweep_button.on_click(lambda _: self._start_sweep())
        self.backtest_button.on_click(lambda _: self._start_backtest())
        self.stop_button.on_click(lambda _: self._request_stop())
        self.export_button.on_click(lambda _: self._export())
        self.best_button.on_click(lambda _: self._export_best())
        self.load_button.on_click(lambda _: self._load())
        for name in BROWSE:
            if name in self.controls:
                self.controls[name].observe(self._on_browse_control, names="value")
        self.browse.observe(self._on_browse_control, names="value")
        self.widget = self._layout(df)
        self.widget.panel = self
        _PANELS.add(self)
        opening = f"{len(df)} rows, columns {', '.join(map(str, df.columns))}."
        if self.gaps:
            self._say("warn", f"{opening} {self._gap_text()} Then press Train.")
        else:
            self._say("info", f"{opening} Pick a target and press Train.")

    def _gap_text(self) -> str:
        where = ", ".join(f"{plural(n, 'missing value')} in {c}" for c, n in self.gaps.items())
        return (f"The frame has gaps ({where}). They are handled as 'gaps (NaN)' says, at the "
                f"top of the Model tab: now {self.controls['missing'].value!r}.")

    # --- layout ---
    def _layout(self, df):
        c = self.controls
        first = []
        if self.gaps:  # the missing-value choice where the user starts (the same widget as on Data)
            where = ", ".join(f"{c_}: {n}" for c_, n in self.gaps.items())
            note = widgets.HTML(f"<div style='color:#8a5a00;margin:4px 0 2px'>The frame has "
                                f"missing values ({html.escape(where)}); choose how to fill "
                                "them (interpolate, ffill) or refuse them (error).</div>")
            note.add_class("rnnkit-gaps")
            first = [note, c["missing"]]
        c["window_full"].layout.margin = "0 0 2px 100px"
        network = [pair_box(c, "window"), c["window_full"], c["horizon"],
                   pair_box(c, "hidden"), c["activation"]]
        if "cell" in c:
            network.append(c["cell"])
        network.append(c["init"])
        grid = [c["sweep_windows_range"], c["sweep_windows_count"], c["sweep_windows"],
                widgets.HTML("<hr style='margin:3px 0;border:none;border-top:1px solid #eee'>"),
                c["sweep_hidden_range"], c["sweep_hidden_count"], c["sweep_hidden"],
                widgets.HTML("<hr style='margin:3px 0;border:none;border-top:1px solid #eee'>"),
                c["sweep_lr_range"], c["sweep_lr_count"], c["sweep_lr"],
                c["sweep_activations"]]
        if "sweep_cells" in c:
            grid.append(c["sweep_cells"])
        grid.append(c["sweep_seeds"])
        pages = {
            "Model": first + _section("network", network)
            + _section("training", [c["optimizer"], pair_box(c, "lr"), pair_box(c, "epochs"),
                                    c["batch_size"], c["clip"], c["seed"]]),
            "Data": _section("what to predict", [c["target"], c["features"], _hint(
                "inputs: none picked = every other numeric column; ctrl-click picks several"),
                c["task"], c["mode"]])
            + _section("rows", [c["time_column"], c["group_column"], c["missing"]]),
            "Grid": _section("values to try: from, to, how many (hidden units and learning "
                             "rates log-spaced), or type a list", grid),
        }
        settings = widgets.Tab(children=[widgets.VBox(v) for v in pages.values()],
                               titles=tuple(pages), selected_index=0)
        settings.add_class("rnnkit-settings")
        actions = widgets.HBox([self.train_button, self.sweep_button, self.stop_button])
        files = widgets.HBox([self.export_button, self.best_button, self.load_button])
        judge = widgets.HBox([self.backtest_button, self.folds])
        left = widgets.VBox([settings, actions, judge, self.browse, self.progress, self.phase,
                             self.progress_label, c["path"], files, self.status],
                            layout=widgets.Layout(width="380px", min_width="380px",
                                                  margin="0 12px 0 0"))
        head = widgets.HTML(
            "<div style='font-size:15px;font-weight:600'>rnnkit &middot; recurrent network "
            f"workbench</div><div style='color:#666'>{len(df)} rows &times; {df.shape[1]} columns, "
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
        """Wait for the background job and the figures it asked for; True when all are done."""
        for attr in ("_thread", "_viewer", "_measurer", "_thread", "_viewer", "_measurer"):  # a job may start the others
            t = getattr(self, attr)
            if t is not None:
                t.join(timeout)
                if t.is_alive():
                    return False
        return True

    def close(self, timeout: Optional[float] = None) -> bool:
        """Stop the job and the drawing, and join their threads; True when both have ended."""
        self._closing = True
        self._stop.set()
        with self._view_lock:
            self._generation += 1
            self._view_request = None
        return self.wait(timeout)

    @property
    def busy(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    # --- status and progress ---
    def _say(self, level: str, text: str) -> None:
        colour = _COLOURS[level]
        body = html.escape(text).replace("\n", "<br>")
        self.status.value = (f"<div style='color:{colour};white-space:normal;line-height:1.35'>"
                             f"{body}</div>")
        self.status_level = level

    @staticmethod
    def _phase_html(now: Optional[str]) -> str:
        parts = []
        for p in PHASES:
            style = ("font-weight:600;color:#1f4e79" if p == now else "color:#999")
            parts.append(f"<span class='rnnkit-phase-{p}' style='{style}'>{p}</span>")
        return ("<div style='font-size:12px'>" + " &rarr; ".join(parts) + "</div>")

    def _set_phase(self, now: Optional[str]) -> None:
        if now == "compiling":  # the bar's first slot, in its own colour until the first epoch
            self.progress.bar_style = "warning"
        elif now == "training":
            self.progress.bar_style = "info"
        self.phase_now = now
        self.phase.value = self._phase_html(now)

    # --- background work ---
    def _run(self, label: str, job: Callable[[], None]) -> None:
        """Start `job` in a thread with the buttons locked; errors land in the status area."""
        if self.busy:
            self._say("warn", "A job is running already; press Stop or wait for it.")
            return
        self._stop.clear()
        with self._view_lock:  # a run being drawn from the sweep yields to the new job
            self._generation += 1
            self._view_request = None
        for b in (self.train_button, self.sweep_button, self.backtest_button, self.load_button):
            b.disabled = True
        self.stop_button.disabled = False
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
                for b in (self.train_button, self.sweep_button, self.backtest_button,
                          self.load_button):
                    b.disabled = False
                self.stop_button.disabled = True

        self._thread = threading.Thread(target=work, name="rnnkit-panel", daemon=True)
        self._thread.start()

    def _fail(self, what: str, e: BaseException) -> None:
        self.progress.bar_style = "danger"
        self.progress_label.value = "failed"
        self._set_phase(None)
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

    # --- drawing one run, fastest figures first ---
    def _measure(self, result) -> Callable[[], tuple]:
        """Start measuring a run's diagnostics, then its loss planes, in a thread of their own.

        The measures are compiled programs (they leave the interpreter free), so
        they run while this thread draws the curve and the scores. Returns a
        function that waits for the planes (re-raising what went wrong there);
        ``result.diagnostics`` waits on its own lock.
        """
        box: dict = {}

        def work():
            try:
                result.diagnostics  # noqa: B018 - measured here, read under its lock later
                box["planes"] = loss_planes(result)
            except BaseException as e:  # noqa: BLE001 - handed to the drawing thread
                box["error"] = e

        t = threading.Thread(target=work, name="rnnkit-panel-measure", daemon=True)
        self._measurer = t
        t.start()

        def planes():
            t.join()
            if "error" in box:
                raise box["error"]
            return box["planes"]

        return planes

    def _draw_run(self, result, made: str, still: Callable[[], bool]) -> None:
        """Curve, scores and forecast at once; then gradients and states; then the surfaces.
        Each slower page says it is computing until it is drawn; `still()` False stops."""
        self.result = result
        self.views.computing(("Gradients", "States"), "the gradients and states", made)
        self.views.computing(("Surface",), "the loss surface", made)
        planes = self._measure(result)
        self.views.show_fast(result, made)
        if not still():
            return
        self.views.show_inside(result, made)
        if not still():
            return
        self.views.show_surfaces(result, made, planes())
        if still():  # the run is named in the status and on every figure; the line stays short
            self.progress_label.value = "every page drawn" + (f" ({made.split('—')[-1].strip()})"
                                                              if "—" in made else "")

    # --- train ---
    def _start_train(self) -> None:
        cfg = self._checked_config()
        if cfg is None:
            return
        # The bar's first slot is the compiling phase (amber while it lasts), then one per epoch.
        self.progress.max = cfg.epochs + 1
        self.progress.value = 1
        self.shown_run = None
        self._quiet = True
        self.browse.value = False  # the trained run is shown; tick the box to browse the sweep again
        self._quiet = False
        self._say("info", f"Training {cfg.hidden} {cfg.activation} units, window {cfg.window}, "
                          f"up to {plural(cfg.epochs, 'epoch')}...")
        self.views.mark_previous(f"A new run is training ({caption(cfg)}).")
        self._set_phase("compiling")
        self._run("compiling the training program (or loading it) and running the first epoch...",
                  lambda: self._train(cfg))

    def _on_epoch(self, row) -> None:
        epoch = int(row["epoch"])
        if epoch == 1:
            self._set_phase("training")
        epochs = self.progress.max - 1  # the first slot was the compiling phase
        self.progress.value = min(epoch + 1, self.progress.max)
        self.progress_label.value = (f"epoch {epoch}/{epochs}  train {row['train_loss']:.4g}"
                                     f"  val {row['val_loss']:.4g}")

    def _train(self, cfg: Config) -> None:
        result = fit(self._df, cfg, progress=False, stop=self._stop, on_epoch=self._on_epoch)
        if self._closing:
            return
        self._set_phase("figures")
        status = str(result.status)
        made = caption(result.config, "trained here")
        self.result = result
        self.views.computing(("Gradients", "States"), "the gradients and states", made)
        self.views.computing(("Surface",), "the loss surface", made)
        planes = self._measure(result)  # measured while the first figures are drawn
        self.views.show_fast(result, made)  # the curve and scores the moment training ends
        if status.startswith("diverged"):
            self.progress.bar_style = "danger"
            self._say("warn", f"The run {status}: the loss became infinite or NaN. Lower the "
                              "learning rate, turn on clipping or pick another init. The "
                              "figures show the last good weights; the curves mark the epoch.")
        else:
            self.progress.bar_style = "success"
            self._say("ok", f"Trained {plural(len(result.history), 'epoch')} ({status}). "
                            f"{stop_reason(result)} {self.views.headline(result)}".replace("  ", " "))
        self.progress_label.value = "measuring the network: gradients and states..."
        self.views.show_inside(result, made)
        if self._closing:
            return
        self.progress_label.value = "drawing the loss surface..."
        self.views.show_surfaces(result, made, planes())
        self._set_phase(None)
        self.progress_label.value = f"done: {status}"

    # --- sweep ---
    def _plan(self):
        cfg = self.config()
        space, seeds, base = read_space(self.controls)
        cfg = cfg.replace(**base)
        return cfg, space, seeds

    def _start_sweep(self) -> None:
        try:
            cfg, space, seeds = self._plan()
        except (ValueError, TypeError) as e:
            self._say("error", f"A setting is not valid: {e}")
            return
        store = run_store(self._df)
        configs = plan(cfg, space, "grid", None, seeds)
        keys = {run_key(c, fp) for c, fp in zip(configs, _fingerprints(self._df, configs))}
        done = len(keys & store.keys())
        self.progress.max = len(keys)
        self.progress.value = done
        shape = " x ".join(str(len(v)) for v in space.values())
        kept = f"; {done} finished before and kept" if done else ""
        self._say("info", f"Sweeping {plural(len(keys), 'run')} ({shape} settings x "
                          f"{plural(seeds, 'seed')}{kept})...")
        self.views.mark_previous("A sweep is running.")
        self._set_phase("training")
        self._run("sweeping", lambda: self._sweep(cfg, space, seeds, store, done))

    def _start_backtest(self) -> None:
        try:
            cfg = self.config()
        except (ValueError, TypeError) as e:
            self._say("error", f"A setting is not valid: {e}")
            return
        folds = int(self.folds.value)
        self._say("info", f"Backtesting these settings over {plural(folds, 'fold')} (each fold "
                          "trains on the rows before its origin; Stop acts between jobs only)...")
        self._set_phase("training")
        self._run("backtesting", lambda: self._backtest(cfg, folds))

    def _backtest(self, cfg: Config, folds: int) -> None:
        result = backtest(self._df, cfg, folds, progress=False)
        if self._closing:
            return
        self.backtest_result = result
        self.views.show_backtest(backtest_view(result))
        self._set_phase(None)
        self.progress_label.value = f"done: backtest over {plural(folds, 'fold')}"
        self._say("ok", f"Backtest finished. {result.comparison['verdict'].iloc[0]}.")

    def _on_run(self, row) -> None:
        self.progress.value = min(self.progress.value + 1, self.progress.max)
        self.progress_label.value = f"run {self.progress.value}/{self.progress.max} finished"

    def _sweep(self, cfg: Config, space: dict, seeds: int, store, done: int) -> None:
        result = sweep(self._df, cfg, space, seeds=seeds, workers=1, store=store, progress=False,
                       stop=self._stop, on_run=self._on_run)
        if self._closing:
            return
        self.sweep_result = result
        self.views.show_sweep(result)
        n = len(result.table)
        if self._stop.is_set():
            self.progress.bar_style = "warning"
            self._say("warn", f"Stopped: {n} of {plural(self.progress.max, 'run')} finished and "
                              "are kept; press Sweep again to run the rest.")
        else:
            self.progress.bar_style = "success"
            again = f" ({done} kept from before)" if done else ""
            self._say("ok", f"Sweep finished: {plural(n, 'run')}{again}. "
                            f"{self.views.sweep_headline(result)} Move the sliders "
                            f"({', '.join(self._browsed())}) to show any run.")
        self._set_phase(None)
        self.progress_label.value = f"done: {plural(n, 'run')}"
        if not self._winner():
            return
        self.best_button.disabled = False
        # Show the winner: its settings go on the controls, its figures on the pages.
        key = result.key()
        self._quiet = True
        try:
            self._put_run_on_controls(key)
            self.browse.disabled = False
            self.browse.value = True
        finally:
            self._quiet = False
        self.show_run(key, say=False)

    def _browsed(self) -> list:
        """The fields the last sweep varied that a control picks (plus seed)."""
        r = self.sweep_result
        return [f for f in BROWSE if f in self.controls and (f in r.varied or f == "seed")]

    def _put_run_on_controls(self, key: str) -> None:
        cfg = self.sweep_result._configs[key]
        c = self.controls
        for f in self._browsed():
            v = getattr(cfg, f)
            if f == "window":
                c["window_full"].value = v == "full"
                if v != "full":
                    set_slider(c["window"], v)
            elif f == "hidden":
                set_slider(c["hidden"], v)
            elif f == "lr":
                c["lr"].value = v
            else:
                c[f].value = v

    # --- browsing a finished sweep ---
    def pick_run(self) -> Optional[str]:
        """The key of the sweep run nearest the controls' settings (None without a sweep).

        Each varied field snaps to the nearest value of the grid (on a log scale
        for hidden units and learning rates); the seed picks among that
        setting's seeds (the first when the control's is not one of them).
        """
        r = self.sweep_result
        if r is None or not len(r.table):
            return None
        t, c = r.table, self.controls
        ok = np.ones(len(t), bool)
        for f in r.varied:
            if f not in BROWSE or f not in c:
                continue
            if f == "window" and c["window_full"].value:
                want = "full"
            elif f == "lr":
                want = read_lr(c["lr"], r.config.lr)
            else:
                want = c[f].value
            values = list(dict.fromkeys(t[f][ok]))
            if want not in values:
                numbers = [v for v in values if isinstance(v, (int, float, np.number))
                           and not isinstance(v, bool)]
                if isinstance(want, (int, float)) and numbers:
                    log = RANGES.get(f) == "log"
                    dist = [abs(np.log(v / want)) if log else abs(v - want) for v in numbers]
                    want = numbers[int(np.argmin(dist))]
                else:
                    want = values[0]
            ok &= np.array([v == want for v in t[f]], bool)
        seeds = t["seed"][ok].tolist()
        seed = c["seed"].value if c["seed"].value in seeds else seeds[0]
        ok &= (t["seed"] == seed).to_numpy()
        return str(t["key"][ok].iloc[0])

    def _on_browse_control(self, change) -> None:
        if (self._quiet or not self.browse.value or self.sweep_result is None or self.busy
                or self._closing):
            return
        key = self.pick_run()
        if key is None:
            return
        # Snap the controls onto the grid point shown, then show it (unless shown already).
        self._quiet = True
        try:
            self._put_run_on_controls(key)
        finally:
            self._quiet = False
        if key != self.shown_run:
            self.show_run(key)

    def show_run(self, key, say: bool = True) -> None:
        """Show one run of the last sweep on every page, from its kept weights (no training).

        Args:
            key: the run's key, or its row position in ``sweep_result.table``.
            say: put which run is shown in the status area (else in the progress line).
        """
        r = self.sweep_result
        key = r.key(key)
        row = int(np.flatnonzero((r.table["key"] == key).to_numpy())[0])
        made = caption(r._configs[key], f"sweep run {row + 1} of {len(r.table)}")
        self.shown_run = key
        self.views.mark_previous(f"Switching to {made}.")
        shown = (f"Showing {made}: {r.table['status'].iloc[row]}, "
                 f"{r.metric} {r.table[r.metric].iloc[row]:.4g}.")
        if say:
            self._say("info", shown)
            self.progress_label.value = f"drawing sweep run {row + 1} of {len(r.table)}..."
        else:
            self.progress_label.value = shown
        self._request_view(lambda: r.result(key), made)

    def _request_view(self, make_result: Callable, made: str) -> None:
        """Draw a run in the drawing thread; a newer request replaces one not yet finished."""
        with self._view_lock:
            self._generation += 1
            self._view_request = (make_result, made, self._generation)
            if self._viewer is None:
                self._viewer = threading.Thread(target=self._view_loop, name="rnnkit-panel-figures",
                                                daemon=True)
                self._viewer.start()

    def _view_loop(self) -> None:
        while True:
            with self._view_lock:
                request, self._view_request = self._view_request, None
                if request is None or self._closing:
                    self._viewer = None  # under the lock: the next request starts a new thread
                    return
            make_result, made, generation = request

            def still(generation=generation):
                return self._generation == generation and not self._closing

            try:
                result = make_result()
                if still():
                    self._draw_run(result, made, still)
            except Exception as e:  # a run that cannot be shown says so; the panel lives on
                if still():
                    self._say("error", f"Could not show {made}: {type(e).__name__}: {e}")

    # --- config file ---
    def _winner(self) -> bool:
        r = self.sweep_result
        return r is not None and bool((r.table["status"] != "failed").any())

    def _path(self) -> Optional[str]:
        path = os.path.expanduser(self.controls["path"].value.strip())
        if not path:
            self._say("error", "JSON file: the path is empty; type where to write, e.g. best.json")
            return None
        return path

    def _export(self) -> None:
        """Save: the settings now on the controls (what the user sees), never the sweep's pick."""
        path = self._path()
        cfg = self._checked_config()
        if path is None or cfg is None:
            return
        self._write(path, lambda: save_config(cfg, path, data=self._df), "the current settings")

    def _export_best(self) -> None:
        """Save sweep winner: the best run of the last sweep, with its scores."""
        path = self._path()
        if path is None:
            return
        if not self._winner():
            self._say("error", "No sweep winner to save: run a sweep first (Save settings "
                               "writes the controls' settings).")
            return
        best = caption(self.sweep_result.best())
        self._write(path, lambda: self.sweep_result.export(path), f"the sweep winner ({best})")

    def _write(self, path: str, write: Callable, which: str) -> None:
        try:
            write()
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
        self._quiet = True
        try:
            write_config(self.controls, cfg)
        finally:
            self._quiet = False
        self.views.show_document(path, text)
        self._say("ok", f"Loaded {path} into the controls.")


def panel(df: pd.DataFrame, config: Optional[Config] = None) -> widgets.Widget:
    """An interactive panel to train, diagnose, sweep, browse the sweep's runs and save on `df`.

    Args:
        df: the series (one long series, or sequences with a group column).
        config: starting settings; None starts from ``Config()``. When the frame
            has missing values and the config refuses them (``missing="error"``,
            the default), the panel starts with "interpolate" and says so.

    Returns:
        an ipywidgets VBox; display it (or leave it as the cell's value).
        ``widget.panel`` is the ``Panel`` behind it (controls, buttons, results).
    """
    return Panel(df, config).widget
