"""Errors raised by wmplan.

Every error a user can cause by bad input (a scenario file, a dataset, a checkpoint, a flag) is a
:class:`WmplanError`. Its message is one line that names the file, the field, the value and the rule, so the CLI
can print it as it is and exit with status 2.
"""

from __future__ import annotations

import re


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


def one_line(text: str, limit: int = 400) -> str:
    """``text`` made safe for a one-line message: control characters escaped, cut to ``limit`` characters."""
    out = "".join(ch if ch.isprintable() else ch.encode("unicode_escape").decode("ascii") for ch in text[: limit + 1])
    return out if len(out) <= limit else out[: limit - 3] + "..."


def _format_loc(loc: tuple, skip: frozenset[str]) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        elif isinstance(part, str) and (part.startswith("function-") or part in skip):
            continue  # pydantic's own markers for validators and union members, not fields of the file
        elif isinstance(part, str) and any(ch in part for ch in ".[] "):
            out += f"[{part!r}]"  # a key that is not a plain name (e.g. a dotted scenario path used as a key)
        else:
            out += ("." if out else "") + str(part)
    return out or "(top level)"


# A custom check that names its own field starts its message with the field's path, e.g.
# "traffic.density_veh_per_km has 2 values ..." or "density_veh_per_km[1] must lie in ...". A path here has at
# least one "_", "." or "[" so that an ordinary first word ("must ...") or a bare "low"/"mean" stays in the text.
_PATH_AT_START = re.compile(r"^([A-Za-z_]\w*(?:\.[A-Za-z_]\w*|\[\d+\])*) (.+)$")


def _field_from_message(field: str, msg: str) -> tuple[str, str]:
    """Move a field path that opens a validator's message into the field slot, joined to where pydantic
    reported the error (a check on a whole model reports the model, not the field it is about)."""
    m = _PATH_AT_START.match(msg)
    if m is None or not any(ch in m.group(1) for ch in "_.["):
        return field, msg
    path, rest = m.groups()
    head = re.split(r"[.\[]", path, maxsplit=1)[0]
    if field == "(top level)":
        return path, rest
    if field == head or field.endswith("." + head):  # the message restates the last part of the location
        return field[: len(field) - len(head)] + path, rest
    return f"{field}.{path}", rest


def format_validation_error(
    source: str,
    err,
    *,
    unknown_key: str = "unknown key",
    model_hints: dict[str, str] | None = None,
    skip: tuple[str, ...] = (),
) -> str:
    """One line for a pydantic ``ValidationError``: file, field, value and rule of the first problem, plus how many
    more there are. The one formatter of the package (scenario files, sweep files, manifests, checkpoints).

    Args:
        source: how the line names the input (a path, or a path and what part of it).
        err: the ``pydantic.ValidationError``.
        unknown_key: the rule stated for a key the model does not know.
        model_hints: rule stated when a value is not of a model's shape, by the model's class name.
        skip: location parts that are union tags rather than fields (left out of the field path).

    Values are quoted at most 80 characters long and the rule at most 400, so the line stays short whatever the
    input holds.
    """
    problems = err.errors(include_url=False)
    first = problems[0]
    field = _format_loc(tuple(first["loc"]), frozenset(skip))
    kind, msg = first["type"], first["msg"]
    if kind == "extra_forbidden":
        msg = unknown_key
    elif kind == "model_type" and (model_hints or {}).get(first.get("ctx", {}).get("class_name")):
        msg = model_hints[first["ctx"]["class_name"]]
    elif kind == "model_type":
        msg = "must be a mapping"
    elif kind in ("tuple_type", "list_type"):
        msg = "must be a list"
    elif kind == "dict_type":
        msg = "must be a mapping"
    elif kind == "value_error" or msg.startswith("Value error, "):
        if msg.startswith("Value error, "):
            msg = msg[len("Value error, ") :]
        field, msg = _field_from_message(field, msg)
    value = first.get("input")
    # The value is shown unless there is none, it is a whole mapping, or our own check already states it.
    hide = kind == "missing" or isinstance(value, dict) or (kind == "value_error" and ", got " in msg)
    shown = "" if hide else f" (got {one_line(repr(value), 80)})"
    more = f" [and {len(problems) - 1} more problem(s)]" if len(problems) > 1 else ""
    return f"{one_line(source, 300)}: {one_line(field, 160)}: {one_line(msg)}{shown}{more}"
