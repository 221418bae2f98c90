"""Write files to a temporary name and rename into place, so a kill never leaves half a file."""
from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path
from typing import Any, Callable


def atomic_write(path: str | os.PathLike, write: Callable[[str], None]) -> Path:
    """Call write(tmp_path), fsync, then rename tmp_path onto path."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    try:
        write(tmp)
        os.chmod(tmp, 0o644)  # mkstemp creates 0600; outputs are meant to be shared
        with open(tmp, "rb") as f:
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path


def write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    def _w(tmp: str) -> None:
        with open(tmp, "wb") as f:
            f.write(data)
    return atomic_write(path, _w)


def write_text(path: str | os.PathLike, text: str) -> Path:
    return write_bytes(path, text.encode("utf-8"))


def write_json(path: str | os.PathLike, obj: Any) -> Path:
    return write_text(path, json.dumps(obj, indent=2, sort_keys=False) + "\n")
