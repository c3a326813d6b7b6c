"""A self-contained HTML report of a fit (and a sweep): figures embedded as PNG."""
from __future__ import annotations

import base64
import html
import io
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd

from ..data._atomic import write_text
from ..sweeps._sweep import higher_is_better

_CSS = """
body { font-family: system-ui, sans-serif; margin: 2rem auto; max-width: 76rem; color: #1d2430; }
h1 { font-size: 1.5rem; } h2 { font-size: 1.15rem; margin-top: 2rem; border-bottom: 1px solid #ccd; }
table { border-collapse: collapse; font-size: 0.85rem; margin: 0.5rem 0; }
td, th { border: 1px solid #d5d9e0; padding: 0.2rem 0.5rem; text-align: right; }
th { background: #eef1f6; }
figure { display: inline-block; margin: 0.4rem; vertical-align: top; width: 36rem; }
figcaption { font-size: 0.8rem; color: #555; max-width: 32rem; }
img { max-width: 36rem; }
.wide { overflow-x: auto; }
.note { background: #fff8e6; border-left: 4px solid #e0a800; padding: 0.5rem 1rem; }
"""

_CAPTIONS = {
    "training": "Training and validation loss per epoch; the best epoch is the one kept.",
    "metrics": "Validation score of the network beside the baselines.",
    "forecast": "Actual against predicted values on the original time index.",
    "forecast_recent": "The last steps of the test range, up close.",
    "future": "The forecast past the end of the data with its split conformal prediction intervals "
              "(from the validation errors; they assume the future behaves like the validation period).",
    "gradient_flow": "Mean norm of dL/dh_k over the window: steep decay means the network "
                     "cannot learn from early steps (vanishing gradients).",
    "spectrum": "Singular values of the recurrent matrix V (gated cells: its candidate "
                "block); values above 1 can make gradients explode.",
    "gate_activity": "Gated cells: the share of each gate's values near 0 (shut) and near 1 "
                     "(open); for LSTM, the mean forget gate at every step of the window.",
    "hidden_states": "Hidden units over the steps of one validation window.",
    "hidden_path": "The hidden state over the validation range, projected on its first "
                   "two principal components.",
    "loss_surface": "Validation loss on a plane through the trained weights along two "
                    "filter-normalised random directions (Li et al. 2018).",
    "loss_slice": "Validation loss along a random direction in the recurrent matrix V.",
    "sweep_surface": "Mean validation metric over two swept settings.",
    "backtest_folds": "Test score of every model in every fold of the backtest; dashed lines are "
                      "the means over folds.",
}


_RECENT = 300  # test rows shown up close


def _png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90, bbox_inches="tight")
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _table(frame: pd.DataFrame, index: bool = True) -> str:
    inner = frame.to_html(index=index, float_format=lambda v: f"{v:.4g}", border=0)
    return f"<div class='wide'>{inner}</div>"


def report_figures(result, sweep_result=None) -> dict:
    """Every figure of the report, by name: the fit's own, loss surfaces, the sweep surface."""
    from .. import plots
    from ..inspection._surface import loss_slice, loss_surface

    figs = dict(result.figures())
    if result.prepared is not None and result.config.task == "regression" and \
            result.config.window != "full":
        pred = result.predict()
        if "split" in pred.columns:
            recent = pred[pred["split"] == "test"].iloc[-_RECENT:]
            if len(recent) >= 2:  # shown right after the full forecast
                ordered = {}
                for name, fig in figs.items():
                    ordered[name] = fig
                    if name == "forecast":
                        ordered["forecast_recent"] = plots.forecast(recent)
                figs = ordered
    if result.prepared is not None:
        alphas, betas, values = loss_surface(result, steps=15)
        figs["loss_surface"] = plots.loss_surface(alphas, betas, values)
        a1, v1 = loss_slice(result, steps=31)
        figs["loss_slice"] = plots.loss_slice(a1, v1, label="V")
    if sweep_result is not None:
        varied = [c for c in sweep_result.varied if sweep_result.table[c].nunique() > 1]
        if len(varied) >= 2:
            figs["sweep_surface"] = plots.sweep_surface(sweep_result.table, varied[0], varied[1],
                                                        metric=sweep_result.metric)
    return figs


def cell_comparison(sweep_result):
    """When a sweep varied the cell: each cell's best setting against the best baseline.

    Returns (table, sentence) or None. The table has one row per cell (its best
    setting's mean score and the best baseline's mean on the same runs); the
    sentence names the winning cell and its margins.
    """
    if "cell" not in sweep_result.varied:
        return None
    s = sweep_result.summary()
    m = sweep_result.metric
    s = s[np.isfinite(s[m].to_numpy(dtype=float))]
    if s.empty:
        return None
    lower = not higher_is_better(m)
    best = s.groupby("cell", sort=False).head(1)  # summary is ranked: the first row per cell
    metric_name = m.split("_", 1)[1] if m.startswith(("val_", "test_")) else m
    split = m.split("_", 1)[0]
    base_cols = [c for c in s.columns if c.endswith(f"_{m}") and c != m]
    rows = []
    for _, r in best.iterrows():
        bases = {c[:-len(m) - 1]: float(r[c]) for c in base_cols if np.isfinite(r[c])}
        name = (min if lower else max)(bases, key=bases.get) if bases else None
        rows.append({"cell": r["cell"], m: float(r[m]), "best baseline": name,
                     f"baseline {m}": bases.get(name, float("nan")) if name else float("nan")})
    table = pd.DataFrame(rows)
    win = table.iloc[0]
    words = [f"Best cell: {win['cell']} ({split} {metric_name} {win[m]:.4g})"]
    for _, r in table.iloc[1:].iterrows():
        words.append(f"{r['cell']} {r[m]:.4g}")
    sentence = words[0] + (", against " + ", ".join(words[1:]) if len(words) > 1 else "")
    if win["best baseline"]:
        b = win[f"baseline {m}"]
        gain = (b - win[m]) / abs(b) if lower else (win[m] - b) / abs(b)
        sentence += (f"; the best baseline, {win['best baseline']}, scores {b:.4g}: the network is "
                     f"{abs(gain):.1%} {'better' if gain > 0 else 'worse'}.")
    return table, sentence


def write_report(path, result, *, sweep_result=None, title: str = "rnnkit report",
                 future: "pd.DataFrame | None" = None) -> Path:
    """Write one HTML file with the fit's tables and figures (and the sweep's), atomically.

    ``future``: a ``result.forecast(...)`` frame to show (a fit whose network reads only the
    target gets one from its own data anyway).
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    figs = report_figures(result, sweep_result)
    if future is not None and result.prepared is not None:
        from ..fitting._fit import future_figure

        figs["future"] = future_figure(result, future)
    elif "future" in figs and result.prepared is not None:
        future = result.forecast()
    parts = [f"<!doctype html><html><head><meta charset='utf-8'><title>{html.escape(title)}"
             f"</title><style>{_CSS}</style></head><body><h1>{html.escape(title)}</h1>",
             f"<p>Written {datetime.now(timezone.utc):%Y-%m-%d %H:%M} UTC. "
             f"Status of the fit: <b>{html.escape(str(result.status))}</b>.</p>",
             "<p class='note'>A forecast supports a decision; it does not make one. Check it on "
             "recent data, watch for changes in the process that produced the data, and compare "
             "with the baselines below before relying on it.</p>",
             "<h2>Scores</h2>", _table(result.metrics)]
    if len(result.metrics_by_lead) and result.metrics_by_lead.index.get_level_values("lead").max() > 1:
        parts += ["<h2>Scores lead by lead (network)</h2>", _table(result.metrics_by_lead.loc[["rnn"]])]
    if future is not None:
        parts += ["<h2>Forecast</h2>",
                  "<p class='note'>The intervals come from the errors on the validation part (split "
                  "conformal): they hold only as far as the future resembles that period. A change of "
                  "regime (a new price, a broken sensor, a pandemic) voids them. Check backtests before "
                  "acting on a forecast.</p>", _table(future)]
    if result.notes:
        parts += ["<h2>Notes</h2><ul>"] + [f"<li>{html.escape(n)}</li>" for n in result.notes] + ["</ul>"]
    if sweep_result is not None:
        cells = cell_comparison(sweep_result)
        if cells is not None:
            table, sentence = cells
            parts += ["<h2>Cells compared</h2>", f"<p>{html.escape(sentence)}</p>",
                      _table(table, index=False)]
        parts += ["<h2>Sweep, ranked</h2>", _table(sweep_result.summary().head(30), index=False)]
    parts.append("<h2>Figures</h2>")
    for name, fig in figs.items():
        parts.append(f"<figure><img alt='{name}' src='data:image/png;base64,{_png(fig)}'>"
                     f"<figcaption>{html.escape(_CAPTIONS.get(name, name))}</figcaption></figure>")
    parts.append("<h2>Configuration</h2><pre>" + html.escape(result.config.to_json()) + "</pre>")
    parts.append("</body></html>")
    return write_text(path, "\n".join(parts))


def write_backtest_report(path, result, *, title: str = "rnnkit backtest") -> Path:
    """Write one HTML file with a backtest's folds, scores, verdicts and its figure, atomically."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    scheme = ", ".join(f"{k} {v}" for k, v in result.scheme.items())
    fig = result.figure()
    cmp = result.comparison
    verdicts = "".join(f"<li>{html.escape(str(v))}</li>" for v in cmp["verdict"])
    parts = [f"<!doctype html><html><head><meta charset='utf-8'><title>{html.escape(title)}"
             f"</title><style>{_CSS}</style></head><body><h1>{html.escape(title)}</h1>",
             f"<p>Written {datetime.now(timezone.utc):%Y-%m-%d %H:%M} UTC. Folds: "
             f"{html.escape(scheme)}; {result.compiles} programs compiled in "
             f"{result.seconds:.1f} s.</p>",
             "<h2>Verdicts</h2>",
             f"<p>Paired tests over the forecasts of every fold ({html.escape(str(cmp['test'].iloc[0]))}"
             f", two-sided):</p><ul>{verdicts}</ul>" if len(cmp) else "<p>No baseline to compare.</p>",
             _table(cmp),
             ("<h3>Lead by lead</h3><p>Each lead alone (Diebold-Mariano's h = the lead); the "
              "verdicts above test the squared error averaged over the leads of each origin (h = "
              "the horizon).</p>" + _table(result.comparison_by_lead))
             if len(result.comparison_by_lead) else "",
             "<h2>Scores over folds</h2>", _table(result.summary()),
             "<h2>Folds</h2>", _table(result.folds, index=False),
             "<h2>Scores per fold</h2>", _table(result.metrics),
             f"<h2>Figure</h2><figure><img alt='backtest_folds' src='data:image/png;base64,{_png(fig)}'>"
             f"<figcaption>{html.escape(_CAPTIONS['backtest_folds'])}</figcaption></figure>",
             "<h2>Configuration</h2><pre>" + html.escape(result.config.to_json()) + "</pre>",
             "</body></html>"]
    return write_text(path, "\n".join(parts))
