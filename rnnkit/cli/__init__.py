"""The command line (``rnnkit demo|fit|sweep|check-gradients``), its HTML report and the demo.

A face: it only calls the parts below it (sweeps, fitting, inspection,
evaluation, data, plots), never the other way round.
"""
from ._main import main as main
from ._main import read_data as read_data
