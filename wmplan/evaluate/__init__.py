"""Evaluation: statistics with honest confidence intervals and calibration of predicted risk.

``stats`` holds the numpy/scipy side (binomial intervals, t intervals, Brier score, reliability bins and expected
calibration error, the near-miss definition); ``paired`` compares a planner with a reference planner on the same
episode seeds (paired differences, exact McNemar p-values, pairs needed for 80 % power, tables). Results on a
simplified traffic model certify nothing about a real vehicle.
"""
