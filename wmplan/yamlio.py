"""Reading YAML that a person wrote (scenario files, sweep files), in bounded time and memory.

:func:`load_yaml` accepts the plain subset of YAML these files need and refuses, with one line naming the file, the
line and the rule:

* files larger than :data:`MAX_BYTES` (checked before reading them whole);
* aliases (``*name``): an alias repeats a node, and nested aliases expand exponentially ("billion laughs");
* nesting deeper than :data:`MAX_DEPTH` lists or mappings (deeper input would exhaust the parser's recursion);
* integer literals longer than :data:`MAX_INT_CHARS` characters (Python refuses to parse very long ones, and no
  field needs them);
* a key given twice in one mapping (YAML's rule, which the default loader does not enforce: the later value would
  silently win);
* keys that are lists or mappings.

Tags that build Python objects are refused as in ``yaml.safe_load``. Error messages quote at most a short excerpt
of the input (:func:`wmplan.errors.one_line`).
"""

from __future__ import annotations

import re
from pathlib import Path

import yaml
from yaml.events import AliasEvent, CollectionEndEvent, CollectionStartEvent
from yaml.nodes import MappingNode

from wmplan.errors import WmplanError, one_line

MAX_BYTES = 256 * 1024
"""Largest YAML file read, in bytes (the built-in scenarios are about 3 KB)."""
MAX_DEPTH = 32
"""Deepest nesting of lists and mappings accepted (the scenario format needs 4)."""
MAX_INT_CHARS = 40
"""Longest integer literal accepted, in characters (underscores and sign included)."""

_Base = getattr(yaml, "CSafeLoader", yaml.SafeLoader)  # libyaml's parser where installed: about 7x faster


class _Refused(Exception):
    """Raised inside the loader; turned into the caller's error class with the source's name."""

    def __init__(self, mark, message: str):
        super().__init__(message)
        self.where = _where(mark)
        self.message = message


def _where(mark) -> str:
    return f"line {mark.line + 1}, column {mark.column + 1}" if mark is not None else "somewhere"


class _BoundedLoader(_Base):  # type: ignore[valid-type, misc]
    """The safe loader with duplicate keys, composite keys and over-long integers refused."""

    def construct_mapping(self, node, deep=False):
        if isinstance(node, MappingNode):
            first_line: dict[object, int] = {}
            for key_node, _ in node.value:
                if not isinstance(key_node, yaml.ScalarNode):
                    raise _Refused(key_node.start_mark, "a key must be a plain value, not a list or a mapping")
                key = self.construct_object(key_node, deep=True)
                if key in first_line:
                    raise _Refused(
                        key_node.start_mark,
                        f"duplicate key {one_line(repr(key), 60)} (first given on "
                        f"line {first_line[key]}); give each key once",
                    )
                first_line[key] = key_node.start_mark.line + 1
        return super().construct_mapping(node, deep=deep)

    def construct_yaml_int(self, node):
        if len(node.value) > MAX_INT_CHARS:
            raise _Refused(
                node.start_mark, f"an integer of {len(node.value)} characters; at most {MAX_INT_CHARS} are accepted"
            )
        return super().construct_yaml_int(node)


_BoundedLoader.add_constructor("tag:yaml.org,2002:int", _BoundedLoader.construct_yaml_int)


def _check_events(text: str, loader: type = _Base) -> None:
    """One pass over the parser's events (no tree is built): refuse aliases and deep nesting."""
    depth = 0
    for event in yaml.parse(text, Loader=loader):
        if isinstance(event, AliasEvent):
            raise _Refused(
                event.start_mark,
                f"alias *{one_line(str(event.anchor), 40)}: aliases are not accepted; write the value out",
            )
        if isinstance(event, CollectionStartEvent):
            depth += 1
            if depth > MAX_DEPTH:
                raise _Refused(event.start_mark, f"lists and mappings nested more than {MAX_DEPTH} deep")
        elif isinstance(event, CollectionEndEvent):
            depth -= 1


_PROBLEM_CLEAN = re.compile(r"\s+")
_PYTHON_PARSER_MAX_CHARS = 64 * 1024  # larger bad input keeps libyaml's wording: the Python parser slows on it


def _python_parser_error(text: str) -> yaml.YAMLError | None:
    """The pure-Python parser's error for ``text`` (its wording is the one documented and tested), if it finds one.

    Only called once libyaml has refused the text, so the slower parser runs on bad input alone.
    """
    if _Base is yaml.SafeLoader or len(text) > _PYTHON_PARSER_MAX_CHARS:
        return None
    try:
        _check_events(text, yaml.SafeLoader)  # stops at the depth limit, before the scanner slows down
    except yaml.YAMLError as err:
        return err
    return None


def load_yaml(text: str, source: str, error: type[WmplanError]) -> object:
    """Parse one YAML document; any problem raises ``error`` with one line ``"{source}: (file): ..."``.

    Args:
        text: the document (at most :data:`MAX_BYTES` bytes as UTF-8).
        source: how the message names the input (its path, or e.g. ``<scenario>``).
        error: the :class:`WmplanError` subclass to raise.
    """
    size = len(text.encode("utf-8", errors="surrogatepass"))
    if size > MAX_BYTES:
        raise error(f"{source}: (file): {size} bytes; YAML input is limited to {MAX_BYTES} bytes")
    try:
        _check_events(text)
        return yaml.load(text, Loader=_BoundedLoader)  # noqa: S506 - a subclass of the safe loader
    except _Refused as err:
        raise error(f"{source}: (file): {err.where}: {err.message}") from None
    except yaml.YAMLError as err:
        try:
            err = _python_parser_error(text) or err
        except _Refused as refused:
            raise error(f"{source}: (file): {refused.where}: {refused.message}") from None
        if isinstance(err, yaml.reader.ReaderError):
            code = err.character if isinstance(err.character, int) else ord(str(err.character)[:1] or "\0")
            raise error(
                f"{source}: (file): character #x{code:04x} at position {err.position}: {one_line(str(err.reason), 80)}"
            ) from None
        mark = getattr(err, "problem_mark", None)
        problem = getattr(err, "problem", None) or "not valid YAML"
        problem = one_line(_PROBLEM_CLEAN.sub(" ", str(problem)), 120)
        raise error(f"{source}: (file): YAML syntax error at {_where(mark)}: {problem}") from None


def read_yaml_file(path: Path, error: type[WmplanError]) -> object:
    """Read and parse a YAML file, checking its size before reading it whole; errors name ``path``."""
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            raw = fh.read(MAX_BYTES + 1)
    except OSError as err:
        raise error(f"{path}: cannot read the file ({err.strerror or err.__class__.__name__})") from None
    if len(raw) > MAX_BYTES:
        raise error(f"{path}: (file): larger than {MAX_BYTES} bytes, the limit for YAML input")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as err:
        raise error(f"{path}: (file): not UTF-8 text (byte {err.start})") from None
    return load_yaml(text, str(path), error)
