"""Files the tool writes and reads: atomic writes, JSON-lines logs, file-format names.

Standard library only, so it runs on a device beside the runner and verify. Every file is
written to a temporary name and renamed into place, so a kill never leaves half a file.
"""
from __future__ import annotations

import json
import os
import re
import socket
import tempfile
from pathlib import Path
from typing import Any, Callable

# The formats the tool writes; each file carries {"format": NAME, "version": N}.
BUNDLE_FORMAT = "tightfit-probe-bundle"
TABLE_FORMAT = "tightfit-latency-table"
TABLE_VERSION = 2  # 2: protocol keys settle_*/time_* (were warmup_*/timed_*)
MANIFEST_FORMAT = "tightfit-export-manifest"
MANIFEST_VERSION = 3  # 2: layer fields spelled out, subnet keys as expansion:kernel; 3: protocol keys settle_*/time_*
VERDICT_FORMAT = "tightfit-verify-verdict"
VERDICT_VERSION = 2  # 2: protocol keys settle_*/time_*


def older_version(path: str | os.PathLike, what: str, version: Any, reads: int, remake: str) -> str:
    """The one line for a file of another version: which file, which versions, how to make it again."""
    age = "an older" if isinstance(version, int) and version < reads else "another"
    return (f"{path} was written by {age} version of tightfit ({what} version {version!r}; this one reads "
            f"version {reads}): {remake}")


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
    return write_text(path, json.dumps(obj, indent=2) + "\n")


def check_writable(out: Path, error: type[Exception], example: str) -> None:
    """Fail before minutes of measuring, not after, when ``out`` cannot be written."""
    if out.is_dir():
        raise error(f"--out {out} is a folder; give a file path such as {example}")
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        fd, probe = tempfile.mkstemp(prefix=f".{out.name}.", suffix=".probe", dir=out.parent)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise error(f"cannot write {out} ({exc.strerror}); choose a writable --out path") from None


def append_jsonl(path: Path, record: dict[str, Any]) -> None:
    """One line per call with a single write in append mode. A line torn by a kill is skipped on
    read, and the next line starts on a fresh line instead of being glued to it."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd = os.open(path, os.O_RDWR | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        size = os.fstat(fd).st_size
        torn = size > 0 and os.pread(fd, 1, size - 1) != b"\n"
        os.write(fd, (("\n" if torn else "") + json.dumps(record) + "\n").encode())
    finally:
        os.close(fd)


def read_jsonl(path: Path) -> tuple[list[dict[str, Any]], int]:
    """(records, malformed lines) of a JSON-lines log; a line torn by a kill is skipped and counted."""
    if not Path(path).is_file():
        return [], 0
    rows, bad = [], 0
    for line in Path(path).read_text("utf-8", errors="replace").splitlines():
        if not line.strip():
            continue
        try:
            rec = json.loads(line)
        except json.JSONDecodeError:
            bad += 1
            continue
        if isinstance(rec, dict):
            rows.append(rec)
    return rows, bad


def device_name(text: str | None = None) -> str:
    """A device name usable as a file stem: ``text`` (default: this host's name) reduced to
    letters, digits, '.', '_' and '-'."""
    name = re.sub(r"[^A-Za-z0-9._-]+", "-", socket.gethostname() if text is None else text).strip("-.")
    return name or "device"
