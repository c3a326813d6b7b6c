"""Evaluation: metrics and the baselines every network is compared with.

Plain arrays and Prepared in, scores out; paired significance tests (_significance).
May import: data, recurrent.
"""
from ._significance import PairedTest as PairedTest
from ._significance import diebold_mariano as diebold_mariano
from ._significance import mcnemar as mcnemar
from ._significance import verdict as verdict
