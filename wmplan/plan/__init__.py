"""Planning under uncertainty: samplers of action sequences (CEM, MPPI) and risk measures over sampled futures.

``samplers`` holds the optimisers (smooth action-sequence sampling, the cross-entropy method, model predictive
path integral control) and ``risk`` turns K predicted futures into collision probabilities, CVaR, clearance and
time-to-collision. Neither knows how the futures were made: they see tensors in the vehicle feature layout of
:mod:`wmplan.sim.features`.
"""
