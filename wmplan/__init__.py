"""wmplan: learned stochastic world models of lane traffic, sampling MPC over their futures, honest risk numbers.

A research sandbox: results on its simplified traffic model certify nothing about a real vehicle.
Importing the package registers the gymnasium environments ``wmplan/<ScenarioName>-v0`` and does nothing else
to the process (the ``wmplan`` command tunes the allocator at its start: :mod:`wmplan._alloc`).
"""

import wmplan.sim.env  # noqa: F401  (registers the wmplan/<Name>-v0 gymnasium envs)

__version__ = "0.1.0"
