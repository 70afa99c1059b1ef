"""wmplan: learned stochastic world models of lane traffic, sampling MPC over their futures, honest risk numbers.

A research sandbox: results on its simplified traffic model certify nothing about a real vehicle.
Importing the package registers the gymnasium environments ``wmplan/<ScenarioName>-v0``.
"""

from wmplan._alloc import tune_malloc

tune_malloc()  # fewer page faults from short-lived large arrays (see wmplan/_alloc.py; WMPLAN_MALLOC_TUNING=0 opts out)

import wmplan.sim.env  # noqa: E402, F401  (registers the wmplan/<Name>-v0 gymnasium envs)

__version__ = "0.1.0"
