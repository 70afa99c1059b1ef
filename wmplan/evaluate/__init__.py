"""Evaluation: statistics with honest confidence intervals and calibration of predicted risk.

``stats`` holds the numpy/scipy side (binomial intervals, t intervals, Brier score, reliability bins and expected
calibration error). Results on a simplified traffic model certify nothing about a real vehicle.
"""
