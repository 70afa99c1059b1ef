"""Errors raised by wmplan.

Every error a user can cause by bad input (a scenario file, a dataset, a checkpoint, a flag) is a
:class:`WmplanError`. Its message is one line that names the file, the field, the value and the rule, so the CLI
can print it as it is and exit with status 2.
"""

from __future__ import annotations


class WmplanError(Exception):
    """Base class of errors caused by input that wmplan refuses."""


class ScenarioError(WmplanError, ValueError):
    """A scenario file or scenario value is malformed or out of range."""


class DatasetError(WmplanError, ValueError):
    """A dataset on disk is missing, truncated, foreign or does not match what was asked for."""


class CheckpointError(WmplanError, ValueError):
    """A model checkpoint is missing, truncated, foreign or from an incompatible schema version."""


class ConfigError(WmplanError, ValueError):
    """A value passed on the command line or to a public function is out of range."""
