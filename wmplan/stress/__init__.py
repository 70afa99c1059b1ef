"""Stress tests: search scenario variants for failures of a planner, and estimate small failure probabilities.

:mod:`wmplan.stress.rare_event` holds the generic estimators (plain Monte Carlo, cross-entropy importance sampling),
:mod:`wmplan.stress.knobs` the map from a standard-normal knob vector to a scenario variant,
:mod:`wmplan.stress.search` the failure search and replay, :mod:`wmplan.stress.runner` the ``wmplan stress`` run.
"""

from wmplan.stress.knobs import DEFAULT_KNOBS, Knob
from wmplan.stress.rare_event import (
    ExponentialFamily,
    GaussianFamily,
    ISResult,
    PlainMCResult,
    cross_entropy_is,
    cross_entropy_levels,
    importance_sample,
    plain_monte_carlo,
)
from wmplan.stress.runner import cli_stress, nominal_reference, run_stress
from wmplan.stress.search import replay, replay_episode, search_failures

__all__ = [
    "DEFAULT_KNOBS",
    "ExponentialFamily",
    "GaussianFamily",
    "ISResult",
    "Knob",
    "PlainMCResult",
    "cli_stress",
    "cross_entropy_is",
    "cross_entropy_levels",
    "importance_sample",
    "nominal_reference",
    "plain_monte_carlo",
    "replay",
    "replay_episode",
    "run_stress",
    "search_failures",
]
