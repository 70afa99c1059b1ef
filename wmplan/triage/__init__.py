"""Failure triage: was a failure the prediction's, the plan's, or past saving? (``wmplan triage RUN_DIR``)

It sits with sweep and stress in the data flow: it imports scenario, sim, evaluate, plan; nothing to its left
imports it. :func:`triage_run` reads an evaluate or stress output folder; :func:`triage_failure` triages one
episode. See :mod:`wmplan.triage.failure` for the method and :mod:`wmplan.triage.search` for what "the drivers'
future events fixed as they happened" means.
"""

from wmplan.triage.failure import CAUSES, triage_failure
from wmplan.triage.run import format_triage, triage_run
from wmplan.triage.search import SearchBudget

__all__ = ["CAUSES", "SearchBudget", "format_triage", "triage_failure", "triage_run"]
