"""Evaluation: metrics and the baselines every network is compared with.

Plain arrays and Prepared in, scores out. May import: data, recurrent.
"""
