"""A notebook view of a backtest: the verdicts in words, the score of every fold, the summary table.

The panel's Backtest button shows it on its Backtest page; ``backtest_view(rnnkit.backtest(df,
cfg))`` shows one result anywhere. Every figure comes from ``rnnkit.plots.backtest_folds``.

    >>> bt = rnnkit.backtest(df, cfg, folds=5)
    >>> rnnkit.notebook.backtest_view(bt)       # display it
"""
from __future__ import annotations

import html
from typing import Optional

import ipywidgets as widgets

from ..fitting._backtest import BacktestResult
from ._views import render

_WORD_COLOUR = {"better": "#1b6e3a", "worse": "#b00020"}


def _verdict_html(sentence: str) -> str:
    colour = next((c for w, c in _WORD_COLOUR.items() if f" is {w} than " in sentence), "#36454f")
    return f"<li style='color:{colour}'>{html.escape(sentence)}</li>"


def backtest_view(result: BacktestResult, column: Optional[str] = None) -> widgets.VBox:
    """A box with the backtest's verdicts, its per-fold bars and its summary table.

    Args:
      result: a BacktestResult.
      column: the score drawn per fold (default test_rmse / test_accuracy).

    Returns:
      ipywidgets.VBox; ``.verdicts`` (HTML, CSS class rnnkit-backtest-verdicts),
      ``.figure`` (Image, rnnkit-fig-backtest) and ``.table`` (HTML, rnnkit-backtest-table)
      are its parts.
    """
    if not isinstance(result, BacktestResult):
        raise TypeError(f"`result` must be a BacktestResult from rnnkit.backtest, got {type(result).__name__}")
    scheme = ", ".join(f"{k} {v}" for k, v in result.scheme.items())
    items = "".join(_verdict_html(v) for v in result.comparison["verdict"])
    tests = ", ".join(dict.fromkeys(t for t in result.comparison["test"] if t))
    verdicts = widgets.HTML(f"<div><b>Backtest</b> ({html.escape(scheme)}). Paired tests over every "
                            f"fold's forecasts ({html.escape(tests or 'none')}):<ul>{items}</ul></div>")
    verdicts.add_class("rnnkit-backtest-verdicts")
    figure = widgets.Image(value=render(result.figure(column)), format="png",
                           layout=widgets.Layout(width="100%", height="auto"))
    figure.add_class("rnnkit-fig-backtest")
    table = widgets.HTML(result.summary().to_html(float_format=lambda v: f"{v:.4g}", border=0))
    table.add_class("rnnkit-backtest-table")
    box = widgets.VBox([verdicts, figure, table])
    box.verdicts, box.figure, box.table = verdicts, figure, table
    return box
