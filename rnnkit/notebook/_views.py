"""The panel's figures and tables: results in, PNG images and HTML tables out.

Every figure comes from ``rnnkit.plots``; this module only picks the data a
figure is drawn from (a FitResult's history, predictions, diagnostics and loss
surfaces; a SweepResult's table), renders it to PNG bytes for an
``ipywidgets.Image`` and closes it. Images work the same in JupyterLab and in
headless tests, and setting ``.value`` from the worker thread syncs.
"""
from __future__ import annotations

import html
import io
from typing import Callable

import ipywidgets as widgets
import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from .. import plots
from ..fitting._fit import future_figure
from ._data import (baseline_series, forecast_frame, gradient_factor, gradient_norms,
                          headline, loss_planes, score_column, sweep_headline, window_times)

DPI = 100
# Figure sizes in inches: one figure across the page, or two side by side.
WIDE = (7.6, 3.6)
HALF = (4.7, 3.5)
SIZES = {"training": WIDE, "forecast": WIDE, "future": WIDE, "gradient": HALF, "spectrum": HALF,
         "heatmap": HALF, "path": HALF, "surface": HALF, "slice": HALF, "sweep": (6.4, 4.0),
         "scores": (7.0, 2.9)}


def sized(name: str, builder: Callable[..., Figure], *args, caption: str = "", **kwargs) -> Figure:
    """``builder(*args, **kwargs)`` drawn into a fresh Figure of the page's size for `name`;
    `caption` (what made the figure: settings and run) goes along its top in small grey type."""
    fig = Figure(figsize=SIZES[name], layout="constrained")
    fig = builder(*args, ax=fig.add_subplot(), **kwargs)
    if caption:
        fig.suptitle(caption, x=0.01, ha="left", fontsize=7.5, color="#666666")
    return fig


def future_note(result) -> str:
    """What the Forecast page says of the forecast past the end of the data."""
    if result.can_forecast():
        steps = result.spec.horizon
        return (f" Below: the next {plural(steps, 'step')} past the end of the data "
                "(result.forecast()), with prediction intervals from the validation errors.")
    if result.config.mode == "many-to-one":
        return (" A forecast past the end needs the other inputs' future values: put them in the "
                "frame's last rows with the target empty and call result.forecast(df=frame).")
    return ""


def _captioned(fig: Figure, caption: str) -> Figure:
    fig.set_size_inches(*SIZES["future"])
    if caption:
        fig.suptitle(caption, x=0.01, ha="left", fontsize=7.5, color="#666666")
    return fig


def plural(n: int, word: str, many: str = "") -> str:
    """'1 seed', '2 seeds' (`many` when the plural is not word + 's')."""
    return f"{n} {word if n == 1 else (many or word + 's')}"


def caption(config, run: str = "") -> str:
    """What made a figure, in one line: the settings that shape a network, and which run."""
    window = "whole sequences" if config.window == "full" else f"window {config.window}"
    cell = getattr(config, "cell", "elman")
    kind = "" if cell == "elman" else cell.upper() + " "  # the plain cell goes unnamed
    parts = [window, f"{config.hidden} {config.activation} {kind}units",
             f"lr {config.lr:.2g}", f"{plural(config.epochs, 'epoch')} max", f"seed {config.seed}"]
    return " · ".join(parts) + (f"  —  {run}" if run else "")


def windows_word(result) -> str:
    """'sequences' when each example is a whole sequence, else 'windows'."""
    return "sequences" if result.prepared.full else "windows"


def render(fig: Figure) -> bytes:
    """PNG bytes of `fig`; the figure is emptied afterwards so nothing holds on to it."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, facecolor="white")
    fig.clear()  # plots builds figures outside pyplot: dropping the last reference frees them
    return buf.getvalue()


def png_width(png: bytes) -> int:
    """Pixel width of PNG bytes (the IHDR chunk's first field)."""
    return int.from_bytes(bytes(png[16:20]), "big")


def _image(name: str) -> widgets.Image:
    img = widgets.Image(format="png", layout=widgets.Layout(width="100%", height="auto",
                                                             display="none"))
    img.add_class("rnnkit-fig-" + name)
    return img


def _note(text: str) -> widgets.HTML:
    return widgets.HTML(f"<div style='color:#777;margin:4px 0'>{html.escape(text)}</div>")


def _cell(v) -> str:
    if isinstance(v, (float, np.floating)):
        return "" if np.isnan(v) else f"{v:.4g}"
    return html.escape(str(v))


def _table_html(df: pd.DataFrame, title: str) -> str:
    """A compact HTML table (index as the first column, numbers to 4 significant digits).

    Inline styles only, so that it looks the same in JupyterLab, classic
    notebooks and exported HTML.
    """
    pad = "padding:2px 10px;border:none;"
    head = "".join(f"<th style='{pad}text-align:right;border-bottom:1px solid #bbb'>"
                   f"{html.escape(str(c))}</th>" for c in [df.index.name or ""] + list(df.columns))
    rows = []
    for k, (label, row) in enumerate(df.iterrows()):
        bg = "#f3f5f7" if k % 2 else "white"
        cells = "".join(f"<td style='{pad}text-align:right'>{_cell(v)}</td>" for v in row)
        rows.append(f"<tr style='background:{bg}'><td style='{pad}text-align:left;font-weight:600'>"
                    f"{_cell(label)}</td>{cells}</tr>")
    return (f"<div style='font-weight:600;margin:8px 0 4px'>{html.escape(title)}</div>"
            # the table scrolls inside its own box, both ways, instead of being cut off
            "<div class='rnnkit-table-box' style='overflow:auto;max-height:300px;max-width:100%;"
            "border:1px solid #e3e3e3'><table style='border-collapse:collapse;font-size:12px;"
            f"line-height:1.5'><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody>"
            "</table></div>")


def _pair(a: widgets.Widget, b: widgets.Widget) -> widgets.HBox:
    a.layout.width = b.layout.width = "50%"
    # flex-start: images keep their own aspect instead of stretching to the taller one.
    return widgets.HBox([a, b], layout=widgets.Layout(width="100%", align_items="flex-start"))


# Opacity of a figure that belongs to an earlier run (a new one is training or being drawn).
# Plain CSS in the page, no JavaScript.
STYLE = ("<style>.rnnkit-previous img, img.rnnkit-previous {opacity: 0.4; filter: grayscale(60%);}"
         "</style>")
# Which images each page shows (for the notes and for marking a page as previous).
PAGE_IMAGES = {"Training": ("training",), "Forecast": ("forecast", "future"),
               "Gradients": ("gradient", "spectrum"), "States": ("heatmap", "path"),
               "Surface": ("surface", "slice"), "Sweep": ("sweep",), "Scores": ("scores",)}
SURFACE_CLIP = 0.8  # the colour scale ends at this quantile of the surface: the basin gets the colours


class FigureViews:
    """The right-hand pages of the panel: one ipywidgets.Tab of figures and tables.

    A run is drawn in three steps, fastest first: ``show_fast`` (training
    curve, scores, forecast), ``show_inside`` (gradients, states: measures the
    diagnostics) and ``show_surfaces`` (loss surfaces). Pages not drawn yet say
    they are computing; figures of an earlier run are marked as previous.
    """

    PAGES = ("Training", "Forecast", "Gradients", "States", "Surface", "Sweep", "Backtest", "Scores",
             "JSON")

    def __init__(self):
        names = ("training", "forecast", "future", "gradient", "spectrum", "heatmap", "path", "surface",
                 "slice", "sweep", "scores")
        self.images = {n: _image(n) for n in names}
        self.notes = {p: _note("Press Train to draw this page.") for p in self.PAGES}
        self.notes["Sweep"].value = self.notes["Sweep"].value.replace("Train", "Sweep")
        self.notes["Backtest"].value = self.notes["Backtest"].value.replace("Train", "Backtest")
        self.backtest_box = widgets.VBox()
        self.notes["JSON"].value = self.notes["JSON"].value.replace(
            "Press Train to draw this page.", "Save or load a config to show its JSON here.")
        for page, note in self.notes.items():
            note.add_class("rnnkit-note-" + page.lower())
        self.window_slider = widgets.IntSlider(
            description="window #", min=0, max=0, value=0, continuous_update=False,
            style={"description_width": "80px"}, layout=widgets.Layout(width="420px"))
        self.window_slider.add_class("rnnkit-window-slider")
        self.sweep_x = widgets.Dropdown(description="across", options=(),
                                        layout=widgets.Layout(width="220px"))
        self.sweep_y = widgets.Dropdown(description="down", options=(),
                                        layout=widgets.Layout(width="220px"))
        self.sweep_table = widgets.HTML()
        self.sweep_table.add_class("rnnkit-sweep-table")
        self.metrics_table = widgets.HTML()
        self.metrics_table.add_class("rnnkit-metrics-table")
        self.diagnostics_table = widgets.HTML()
        self.document = widgets.HTML()
        self.document.add_class("rnnkit-document")
        self.result = None
        self.sweep_result = None
        self.caption = ""  # what made the figures now shown
        self.previous = set()  # pages whose figures belong to an earlier run
        self._quiet = False  # True while the slider is being reset with a new result

        i = self.images
        pages = {
            "Training": [i["training"]],
            "Forecast": [i["forecast"], i["future"]],
            "Gradients": [_pair(i["gradient"], i["spectrum"]), self.diagnostics_table],
            "States": [self.window_slider, _pair(i["heatmap"], i["path"])],
            "Surface": [_pair(i["surface"], i["slice"])],
            "Sweep": [widgets.HBox([self.sweep_x, self.sweep_y]), i["sweep"], self.sweep_table],
            "Backtest": [self.backtest_box],
            "Scores": [self.metrics_table, i["scores"]],
            "JSON": [self.document],
        }
        self.tab = widgets.Tab(
            children=[widgets.VBox([self.notes[p], *kids], layout=widgets.Layout(padding="6px"))
                      for p, kids in pages.items()],
            titles=self.PAGES, layout=widgets.Layout(flex="1 1 auto", min_width="560px"))
        self.tab.add_class("rnnkit-pages")
        self.widget = widgets.VBox([widgets.HTML(STYLE), self.tab],
                                   layout=widgets.Layout(flex="1 1 auto", min_width="560px"))
        self.window_slider.observe(self._on_window, names="value")
        self.sweep_x.observe(self._on_axes, names="value")
        self.sweep_y.observe(self._on_axes, names="value")

    def select(self, page: str) -> None:
        self.tab.selected_index = self.PAGES.index(page)

    # --- a figure and its page ---
    def _draw(self, page: str, image: str, make: Callable[[], Figure]) -> bool:
        """Render one figure into its image; a failure blanks it and says why on its page."""
        try:
            self.set_image(image, render(make()))
            return True
        except Exception as e:  # one figure that cannot be drawn must not stop the others
            self.set_image(image, b"")
            self._note(page, f"{image} figure not drawn: {type(e).__name__}: {e}")
            return False

    def set_image(self, name: str, png: bytes) -> None:
        """Show PNG bytes in one image; empty bytes hide it (no broken-image icon)."""
        img = self.images[name]
        img.value = png
        img.layout.display = None if png else "none"
        if png:  # never scaled up past its own pixels: text keeps its size
            img.layout.max_width = f"{png_width(png)}px"

    def _current(self, page: str) -> None:
        """The page's figures are the shown run's (not an earlier one's)."""
        self.previous.discard(page)
        for name in PAGE_IMAGES.get(page, ()):
            self.images[name].remove_class("rnnkit-previous")

    def mark_previous(self, why: str, pages=None) -> None:
        """Mark the figures of `pages` (default: every run page) as an earlier run's, saying `why`."""
        for page in pages or ("Training", "Forecast", "Gradients", "States", "Surface", "Scores"):
            shown = [n for n in PAGE_IMAGES[page] if self.images[n].value]
            if not shown:
                self._note(page, why)
                continue
            self.previous.add(page)
            for name in shown:
                self.images[name].add_class("rnnkit-previous")
            made = f" (made by: {self.caption})" if self.caption else ""
            self._note(page, f"Previous run's figures{made}. {why}")

    def computing(self, pages, what: str, made: str) -> None:
        """Say on `pages` that their figures are being computed for the run `made` describes
        (figures of an earlier run stay, marked as previous)."""
        self.mark_previous(f"Computing {what} for {made}...", pages)

    # --- a trained network, fastest figures first ---
    def show_fast(self, result, caption: str) -> None:
        """The training curve, the scores and the forecast of one FitResult (no diagnostics)."""
        self.result, self.caption = result, caption
        cfg = result.config
        classify = cfg.task == "classification"
        self._current("Training")
        status = str(result.status)
        loss = "Cross-entropy per epoch" if classify else "Loss per epoch in scaled units"
        self._note("Training", f"{loss}; the star marks the epoch whose "
                               "weights are kept; dotted: the gradient norm before clipping."
                   + (f" {status[0].upper() + status[1:]}." if status != "ok" else ""))
        self._draw("Training", "training",
                   lambda: sized("training", plots.training_curves, result.history,
                                 status=status, caption=caption))

        metrics = result.metrics
        what = windows_word(result)
        self.metrics_table.value = _table_html(metrics, "scores: the network against baselines")
        column = score_column(metrics, cfg.task)
        self._current("Scores")
        if classify:
            self._note("Scores", f"Every model scored on the same held-out {what}: accuracy "
                                 "and balanced accuracy (higher is better), log loss (lower is "
                                 "better).")
        else:
            self._note("Scores", "Every model scored on the same targets, in the target's own "
                                 "units (MASE: against the in-sample naive forecast).")
        self._draw("Scores", "scores", lambda: sized("scores", plots.metrics_bar, metrics,
                                                     column=column, highlight="rnn",
                                                     caption=caption))

        pred = forecast_frame(result)
        self._current("Forecast")
        if classify:
            per = "one step per held-out sequence" if result.prepared.full else "held-out range"
            self._note("Forecast", f"Class probabilities, {per}, with the actual and the "
                                   "predicted class in the strips above.")
            def make_classes():
                fig = sized("forecast", plots.class_forecast, pred, caption=caption)
                if result.prepared.full:  # one target per sequence, named by its id
                    fig.axes[0].set_xlabel(f"sequence ({pred.index.name or 'id'})")
                return fig

            self._draw("Forecast", "forecast", make_classes)
        else:
            base_name, base = baseline_series(result, pred.index)
            self._note("Forecast", f"Held-out range in original units; dashed: the best baseline "
                                   f"({base_name})." + future_note(result))
            target = ", ".join(result.prepared.target_names)

            def make():
                fig = sized("forecast", plots.forecast, pred, baseline=base,
                            baseline_name=base_name, caption=caption)
                fig.axes[0].set_ylabel(target)  # a single target's columns carry no name
                return fig

            self._draw("Forecast", "forecast", make)
            self._draw_future(result, caption)

    def _draw_future(self, result, caption: str) -> None:
        """Below the held-out range: the forecast past the end of the data, with its bands."""
        if not result.can_forecast():
            self.set_image("future", b"")
            return
        self._draw("Forecast", "future", lambda: _captioned(
            future_figure(result, result.forecast()), caption))

    def show_inside(self, result, caption: str) -> None:
        """The gradient and state pages (measures the diagnostics on first use)."""
        cfg = result.config
        d = result.diagnostics
        what = windows_word(result)
        sigma = float(d.singular_values[0])
        self._current("Gradients")
        if cfg.task == "classification" or not d.gradient_bound_applies:
            # the bound line is left to the regression pages, and holds for the Elman cell only
            self._note("Gradients", f"Measured on {plural(d.gradient_windows, d.split + ' ' + what[:-1], d.split + ' ' + what)}; "
                                    f"right: the singular values of V (largest {sigma:.3g})."
                       + ("" if d.gradient_bound_applies else " " + d.gradient_bound_note[0].upper()
                          + d.gradient_bound_note[1:] + "."))
            bound = None
        else:
            factor = sigma * gradient_factor(cfg.activation)
            self._note("Gradients", f"Measured on {plural(d.gradient_windows, d.split + ' window', d.split + ' windows')}. "
                                    f"Dashed: the bound ||dL/dh_T|| x sigma^(T-k), sigma = "
                                    f"sigma_max(V) = {sigma:.3g}"
                                    + (" x 1/4 (sigmoid)" if cfg.activation == "sigmoid" else "") + ".")
            bound = factor if factor > 0 else None
        self._draw("Gradients", "gradient", lambda: sized(
            "gradient", plots.gradient_flow, gradient_norms(d), sigma_max=bound, caption=caption))
        self._draw("Gradients", "spectrum", lambda: sized("spectrum", plots.spectrum,
                                                          d.singular_values, caption=caption))
        self.diagnostics_table.value = _table_html(d.summary().to_frame(), "inside the network")

        n = int(d.val_states.shape[0])
        one = what[:-1]
        self._current("States")
        self._note("States", f"Left: one {d.split} {one}, hidden units x steps (the slider picks "
                             f"one of {n}). Right: the last state of every {d.split} {one} "
                             "on its first two principal components.")
        self._quiet = True
        self.window_slider.description = f"{one} #"
        self.window_slider.value = 0
        self.window_slider.max = max(n - 1, 0)
        self._quiet = False
        self._draw_window(0)
        self._draw("States", "path", lambda: sized("path", plots.hidden_path, d.val_states,
                                                   times=d.val_times, caption=caption))

    def show_surfaces(self, result, caption: str, planes=None) -> None:
        """Draw the loss-surface page (the slowest: many loss evaluations); ``planes``: what
        ``loss_planes(result)`` gives, when it was computed already."""
        (a, b, surface), (s, values) = loss_planes(result) if planes is None else planes
        self._current("Surface")
        self._note("Surface", "Left: validation loss on a random plane through the trained "
                              "weights, filter-normalised (Li et al. 2018); the colours span "
                              f"the lowest {SURFACE_CLIP:.0%} of the values on a log scale, "
                              "higher ones share the top colour. Right: along a random "
                              "direction in V only.")
        self._draw("Surface", "surface", lambda: sized("surface", plots.loss_surface, a, b,
                                                       surface, clip=SURFACE_CLIP, caption=caption))
        self._draw("Surface", "slice", lambda: sized("slice", plots.loss_slice, s, values,
                                                     label="V", caption=caption))

    def _note(self, page: str, text: str) -> None:
        self.notes[page].value = (f"<div style='color:#555;margin:2px 0 6px'>{html.escape(text)}</div>"
                                  if text else "")

    def _draw_window(self, i: int) -> None:
        r, caption = self.result, self.caption

        def make():
            states = r.diagnostics.window_states(int(i))  # (T, H)
            return sized("heatmap", plots.hidden_heatmap, states,
                         times=window_times(r, int(i), len(states)), caption=caption)

        self._draw("States", "heatmap", make)

    def _on_window(self, change) -> None:
        if self._quiet or self.result is None or "States" in self.previous:
            return
        self._draw_window(change["new"])

    # --- a sweep ---
    def show_sweep(self, result) -> None:
        """Draw the sweep page of one SweepResult (called in the worker thread)."""
        self.sweep_result = result
        axes = [f for f in result.varied] + ["seed"]
        x = "window" if "window" in axes else axes[0]
        y = "hidden" if "hidden" in axes and x != "hidden" else next(a for a in axes if a != x)
        self._quiet = True
        self.sweep_x.options = axes
        self.sweep_y.options = axes
        self.sweep_x.value, self.sweep_y.value = x, y
        self._quiet = False
        self._draw_sweep()
        summary = result.summary().set_index("rank")
        m = result.metric
        keep = list(result.varied) + ["runs", m, f"{m}_std", "seed_spread",
                                      m.replace("val_", "test_", 1), "diverged", "failed"]
        keep = list(dict.fromkeys(c for c in keep if c in summary.columns))
        self.sweep_table.value = _table_html(
            summary[keep], f"settings ranked by {m}: mean over seeds, its standard deviation "
                           "and seed_spread (max - min over seeds)")
        runs = plural(len(result.table), "run")
        self._note("Sweep", f"{runs}; {result.missing} not run." if result.missing
                   else f"{runs}. Move the sliders on the left to show any run on the other pages.")
        self.select("Sweep")

    def _draw_sweep(self) -> None:
        r = self.sweep_result
        x, y = self.sweep_x.value, self.sweep_y.value
        if x == y:
            self._note("Sweep", "Pick two different settings for the two axes.")
            return
        made = f"sweep of {plural(len(r.table), 'run')}, ranked by {r.metric}"
        self._draw("Sweep", "sweep", lambda: sized("sweep", plots.sweep_surface, r.table, x, y,
                                                   metric=r.metric, caption=made))

    def _on_axes(self, change) -> None:
        if not self._quiet and self.sweep_result is not None:
            self._draw_sweep()

    # --- the config file ---
    def show_backtest(self, box) -> None:
        """The Backtest page shows `box` (``_backtest_view.backtest_view`` of a result)."""
        self._note("Backtest", "Each fold trains on the rows before its forecast origin and "
                               "forecasts the block after it; every model is scored on the same "
                               "blocks.")
        self.backtest_box.children = (box,)
        self.select("Backtest")

    def show_document(self, path: str, text: str) -> None:
        self.document.value = (f"<div style='color:#555'>{html.escape(path)}</div>"
                               "<pre style='font-size:12px;line-height:1.3;background:#f6f8fa;"
                               f"padding:8px;max-height:520px;overflow:auto'>{html.escape(text)}</pre>")
        self._note("JSON", "")
        self.select("JSON")

    headline = staticmethod(headline)
    sweep_headline = staticmethod(sweep_headline)
