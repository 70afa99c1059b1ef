"""Small file helpers shared by every stage: atomic writes (a temporary file in the same folder, then a rename)."""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a temporary file in the same folder and an atomic rename."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def atomic_write_json(path: Path, obj: object) -> None:
    """Write ``obj`` as indented JSON to ``path`` atomically (temporary file, then rename)."""
    atomic_write_bytes(path, (json.dumps(obj, indent=2, sort_keys=False) + "\n").encode())


def atomic_write_text(path: Path, text: str) -> None:
    """Write UTF-8 ``text`` to ``path`` atomically (temporary file, then rename)."""
    atomic_write_bytes(path, text.encode("utf-8"))


def read_json_object(path: Path) -> dict:
    """The JSON object in ``path``; a one-line ConfigError naming the file if it is unreadable or not an object."""
    from wmplan.errors import ConfigError

    try:
        data = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as err:
        raise ConfigError(f"{path}: not readable JSON ({type(err).__name__}: {err})") from None
    if not isinstance(data, dict):
        raise ConfigError(f"{path}: expected a JSON object at the top, got {type(data).__name__}")
    return data
