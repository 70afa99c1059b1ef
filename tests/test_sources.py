"""Sources stay inside the repository: every citation can be followed by a reader of the tree.

What is checked, on every file git tracks (``git ls-files``):

* no absolute path of a machine (a path under the root folders of home, work or temporary directories, or
  under a drive letter) and no pointer to a document outside the repository (the shared sheets of the people
  who wrote the code, or their folder beside the checkout);
* every ``docs/references.md#<key>`` cited anywhere names an entry of ``docs/references.md`` (an entry is a
  ``###`` heading that is exactly its key), keys are unique, and every file path that an entry gives under
  "Used" or "Checked" exists;
* every test module whose docstring names a source, a reference or a year cites at least one entry.

Each rule is also run on made-up text that breaks it (the control cases below), so the checks are shown able
to fail. This is a contract of the project (DEVELOPERS.md, "Tests and benchmarks"), not a reference test; it
cites no entry itself and is the one test module exempt from the last rule.
"""

from __future__ import annotations

import ast
import re
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
REF_DOC = "docs/references.md"
THIS_FILE = "tests/test_sources.py"
CITE = "docs/references.md" + "#"  # split so that the control cases below cite nothing themselves

# Built from pieces, so that this file does not match its own patterns.
_SHEETS = "|".join(("REFER" + "ENCES", "ST" + "YLE", "DES" + "IGN"))
OUTSIDE_DOCUMENT = re.compile(r"\b(?:" + _SHEETS + r")\b|\.\./" + "shared\\b")
_ROOT_FOLDERS = "|".join(("wo" + "rk", "ho" + "me", "ro" + "ot", "Us" + "ers", "t" + "mp"))
MACHINE_PATH = re.compile(r"(?<![\w.~/$-])/(?:" + _ROOT_FOLDERS + r")/[\w<{$.~-]|\b[A-Za-z]:\\{1,2}[\w.-]")
CITATION = re.compile(r"docs/references\.md#([A-Za-z0-9_-]+)")
ENTRY_HEADING = re.compile(r"^### +([^\s]+) *$", re.MULTILINE)
NAMES_A_SOURCE = re.compile(r"\b[Ss]ources?\b|\b[Rr]eferences?\b|\b(?:19|20)\d\d\b")
NO_SOURCE = re.compile(r"\bno (?:external )?source(?: needed)?\b")
PATH_IN_ENTRY = re.compile(r"`((?:tests|wmplan|benchmarks|scenarios|notebooks)/[\w./-]+\.(?:py|yaml|ipynb))`")


def tracked_files() -> list[str]:
    """Paths of the files git tracks, relative to the repository root."""
    out = subprocess.run(["git", "ls-files", "-z"], cwd=ROOT, capture_output=True, check=True)
    return [p for p in out.stdout.decode().split("\0") if p]


def read_text(rel: str) -> str | None:
    """The file's text, or None for a symlink or a directory (the package's link to ``scenarios/``)."""
    path = ROOT / rel
    if path.is_symlink() or not path.is_file():
        return None
    return path.read_bytes().decode("utf-8", errors="replace")


def outside_pointers(text: str) -> list[tuple[int, str]]:
    """(line number, line) of each line holding a machine path or a pointer to a document outside the tree."""
    return [
        (i, line.strip())
        for i, line in enumerate(text.splitlines(), start=1)
        if OUTSIDE_DOCUMENT.search(line) or MACHINE_PATH.search(line)
    ]


def entry_keys(doc: str) -> list[str]:
    """Keys of the entries of a references document, in order (duplicates kept)."""
    return ENTRY_HEADING.findall(doc)


def missing_keys(texts: dict[str, str], keys: set[str]) -> list[str]:
    """'file: key' for every citation of a key that is not an entry."""
    return [f"{rel}: {key}" for rel, text in texts.items() for key in CITATION.findall(text) if key not in keys]


def uncited_test_modules(texts: dict[str, str]) -> list[str]:
    """Test modules whose docstring names a source, a reference or a year, but that cite no entry."""
    bad = []
    for rel, text in texts.items():
        name = rel.rsplit("/", 1)[-1]
        is_test_module = rel.startswith("tests/") and name.startswith("test_") and name.endswith(".py")
        if not is_test_module or rel == THIS_FILE:
            continue
        doc = NO_SOURCE.sub("", ast.get_docstring(ast.parse(text)) or "")
        if NAMES_A_SOURCE.search(doc) and not CITATION.search(text):
            bad.append(rel)
    return bad


@pytest.fixture(scope="module")
def texts() -> dict[str, str]:
    out = {}
    for rel in tracked_files():
        text = read_text(rel)
        if text is not None:
            out[rel] = text
    return out


@pytest.fixture(scope="module")
def keys(texts: dict[str, str]) -> list[str]:
    assert REF_DOC in texts, f"{REF_DOC} is not tracked by git"
    return entry_keys(texts[REF_DOC])


def test_no_machine_path_and_no_pointer_outside_the_repository(texts):
    """No tracked file names a path of a machine or a document outside the repository."""
    found = [f"{rel}:{n}: {line}" for rel, text in texts.items() for n, line in outside_pointers(text)]
    message = "paths or documents outside the repository (cite docs/references.md#<key>):\n"
    assert not found, message + "\n".join(found)


def test_every_cited_key_is_an_entry(texts, keys):
    """Every docs/references.md#<key> cited in the tree is an entry, and there are citations to check."""
    cited = sum(len(CITATION.findall(t)) for t in texts.values())
    assert cited > 100, f"only {cited} citations of {REF_DOC} found"
    missing = missing_keys(texts, set(keys))
    assert not missing, f"cited keys with no entry in {REF_DOC}:\n" + "\n".join(missing)


def test_entry_keys_are_unique_and_well_formed(keys):
    """Keys are lower-case words joined by dashes, each heading one entry."""
    assert len(keys) > 50
    assert len(keys) == len(set(keys)), sorted(k for k in keys if keys.count(k) > 1)
    assert all(re.fullmatch(r"[a-z0-9]+(?:-[a-z0-9]+)*", k) for k in keys), keys


def test_files_named_by_entries_exist(texts):
    """Every file an entry says a source is used or checked in is tracked."""
    named = set(PATH_IN_ENTRY.findall(texts[REF_DOC]))
    assert len(named) > 40
    assert not sorted(named - set(texts)), sorted(named - set(texts))


def test_test_modules_that_name_sources_cite_an_entry(texts):
    """A test module whose docstring names a source, a reference or a year cites docs/references.md#<key>."""
    bad = uncited_test_modules(texts)
    assert not bad, "name a source but cite no docs/references.md#<key>:\n" + "\n".join(bad)


def test_every_scenario_file_cites_its_sources(texts):
    """Each scenario file's header comment cites at least one entry for its defaults."""
    scenario_files = [rel for rel in texts if rel.startswith("scenarios/") and rel.endswith(".yaml")]
    assert len(scenario_files) >= 5
    header = {rel: "".join(ln for ln in texts[rel].splitlines(True) if ln.startswith("#")) for rel in scenario_files}
    bad = [rel for rel, h in header.items() if "Sources" in h and not CITATION.search(h)]
    assert not bad, bad


# --- control cases: each rule catches text that breaks it ------------------------------------------------


@pytest.mark.parametrize(
    "line",
    [
        "see " + "/wo" + "rk/shared/notes.md for the values",
        "written on " + "/ho" + "me/someone/project/tests",
        "open " + "/t" + "mp/run-3/out.json",
        "(" + "/ro" + "ot/src/x.py)",
        "C:" + "\\" + "Users\\x\\y.py",
        "tags of the " + "REFER" + "ENCES sheet",
        "see ST" + "YLE.md section 9",
        "../sha" + "red/notes.md",
    ],
)
def test_control_outside_pointers_are_caught(line):
    assert outside_pointers("first line\n" + line + "\n") == [(2, line.strip())]


@pytest.mark.parametrize(
    "line",
    [
        "runs/wk/x.json and out/hm/y.png",
        "https://example.org/page",
        "tmp_path / 'out.json'",
        "the style of the figures; design decisions worth knowing",
        "docs/references.md#treiber-2000-idm",
    ],
)
def test_control_ordinary_text_is_not_caught(line):
    assert outside_pointers(line) == []


def test_control_missing_key_and_uncited_module_are_caught():
    doc = "# title\n\n### known-key\n\ntext\n\n### other-key\n"
    assert entry_keys(doc) == ["known-key", "other-key"]
    texts = {"tests/test_x.py": f'"""Source: A. Author (1999)."""\n# {CITE}unknown-key\n'}
    assert missing_keys(texts, set(entry_keys(doc))) == ["tests/test_x.py: unknown-key"]
    assert missing_keys({"a.py": f"{CITE}known-key"}, set(entry_keys(doc))) == []
    uncited = {
        "tests/test_a.py": '"""Checked against the law of Someone (2001)."""\n',
        "tests/test_b.py": '"""Contract tests: same seed, same result (no external source)."""\n',
        "tests/test_c.py": f'"""Source: {CITE}known-key."""\n',
        "tests/sim/test_d.py": '"""Common practice, no source; the reference library is scipy."""\n',
        "tests/helpers.py": '"""Slow reference paths kept for the tests."""\n',
    }
    assert uncited_test_modules(uncited) == ["tests/test_a.py", "tests/sim/test_d.py"]
