"""The notebook panel: ipywidgets wiring over the public functions (fit, sweep, export).

A face: it only calls the parts below it (sweeps, fitting, inspection,
evaluation, data, plots), never the other way round.
"""
from ._panel import Panel as Panel
from ._panel import panel as panel
from ._backtest_view import backtest_view as backtest_view
