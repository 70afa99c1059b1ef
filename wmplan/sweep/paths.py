"""Dotted paths into a scenario: ``traffic.density_veh_per_km[1]``, ``drivers.yield_prob.mean``.

A path names one value of the plain dict that :func:`wmplan.scenario.scenario_to_dict` makes of a scenario (every
default written out), so any scenario field can be swept. Mapping keys are joined with ``.``; list items are
picked with ``[index]``. :func:`set_path` works on a copy; the caller re-validates the result with
:func:`wmplan.scenario.parse_scenario`, so a value the scenario refuses gets the scenario's own error.
"""

from __future__ import annotations

import copy
import difflib
import re

_TOKEN = re.compile(r"([A-Za-z_][A-Za-z0-9_]*)|\[(\d+)\]")
PATH_PATTERN = r"^[A-Za-z_][A-Za-z0-9_]*(\[\d+\])*(\.[A-Za-z_][A-Za-z0-9_]*(\[\d+\])*)*$"
"""What a dotted path looks like: names joined by dots, each optionally followed by list indices."""

Token = str | int


class PathError(ValueError):
    """A dotted path is malformed or does not name a value of the scenario; the message is one phrase."""


def parse_path(path: str) -> tuple[Token, ...]:
    """``"a.b[1].c"`` -> ``("a", "b", 1, "c")``; raises :class:`PathError` if the text is not a dotted path."""
    if not re.fullmatch(PATH_PATTERN, path):
        raise PathError("is not a dotted path like 'traffic.density_veh_per_km[1]' or 'drivers.yield_prob.mean'")
    tokens: list[Token] = []
    for name, index in _TOKEN.findall(path):
        tokens.append(name if name else int(index))
    return tuple(tokens)


def format_path(tokens: tuple[Token, ...]) -> str:
    """Inverse of :func:`parse_path`."""
    out = ""
    for tok in tokens:
        if isinstance(tok, int):
            out += f"[{tok}]"
        else:
            out += ("." if out else "") + tok
    return out


def all_paths(data: object, prefix: tuple[Token, ...] = ()) -> list[str]:
    """Every dotted path of a nested dict/list structure, inner nodes and leaves, in document order."""
    out: list[str] = []
    if isinstance(data, dict):
        for key, value in data.items():
            here = prefix + (str(key),)
            out.append(format_path(here))
            out.extend(all_paths(value, here))
    elif isinstance(data, list):
        for i, value in enumerate(data):
            here = prefix + (i,)
            out.append(format_path(here))
            out.extend(all_paths(value, here))
    return out


def close_matches(path: str, data: object, n: int = 5) -> list[str]:
    """Up to ``n`` existing paths of ``data`` that look like ``path`` (difflib ratio >= 0.6, best first)."""
    candidates = all_paths(data)
    found = difflib.get_close_matches(path, candidates, n=n, cutoff=0.6)
    if not found:
        # A misspelt last part is easier to find by the last part alone (``drivers.yeld_prob.mean``).
        last = path.rsplit(".", 1)[-1]
        by_last = {c: c.rsplit(".", 1)[-1] for c in candidates}
        hits = difflib.get_close_matches(last, list(set(by_last.values())), n=n, cutoff=0.6)
        found = [c for c in candidates if by_last[c] in hits][:n]
    return found


def _walk(data: object, tokens: tuple[Token, ...], path: str) -> tuple[object, Token]:
    """The container that holds the last token, checking every step; raises :class:`PathError`."""
    node = data
    for depth, tok in enumerate(tokens):
        last = depth == len(tokens) - 1
        where = format_path(tokens[:depth]) or "the scenario"
        if isinstance(tok, int):
            if not isinstance(node, list):
                raise PathError(f"{where} is not a list, so [{tok}] does not apply")
            if tok >= len(node):
                raise PathError(f"index [{tok}] is out of range: {where} has {len(node)} value(s)")
        else:
            if not isinstance(node, dict):
                raise PathError(f"{where} is a single value, it has no field {tok!r}")
            if tok not in node:
                raise PathError("is not a field of the scenario")
        if last:
            return node, tok
        node = node[tok]  # type: ignore[index]
    raise PathError("is empty")


def get_path(data: object, path: str) -> object:
    """The value at ``path`` in ``data``; raises :class:`PathError` if it does not exist."""
    tokens = parse_path(path)
    node, tok = _walk(data, tokens, path)
    return node[tok]  # type: ignore[index]


def set_path(data: dict, path: str, value: object) -> dict:
    """A deep copy of ``data`` with the value at ``path`` replaced by ``value``."""
    tokens = parse_path(path)
    out = copy.deepcopy(data)
    node, tok = _walk(out, tokens, path)
    node[tok] = copy.deepcopy(value)  # type: ignore[index]
    return out
