"""Progress bars that stay readable in a log: a live bar on a terminal, a plain line every few
seconds when output is redirected (CI logs, `> log`), instead of hundreds of redrawn frames."""
from __future__ import annotations

import io
import sys
from typing import Any, Iterable, Optional, TextIO

from tqdm import tqdm

PLAIN_EVERY_S = 10.0  # seconds between plain lines when not on a terminal


class _Lines(io.TextIOBase):
    """A stream that turns tqdm's carriage-return redraws into one newline-terminated line each."""

    def __init__(self, stream: TextIO):
        self.stream = stream

    def write(self, text: str) -> int:
        line = text.replace("\r", "").strip()
        if line:
            self.stream.write(line + "\n")
            self.stream.flush()
        return len(text)

    def flush(self) -> None:
        self.stream.flush()


class _PlainBar(tqdm):
    """tqdm whose postfix changes wait for the next timed line: tqdm redraws on every set_postfix by
    default, which wrote one line per training step into redirected logs."""

    def set_postfix(self, ordered_dict=None, refresh=True, **kwargs):  # noqa: ARG002 (refresh ignored)
        super().set_postfix(ordered_dict, refresh=False, **kwargs)


def bar(iterable: Optional[Iterable[Any]] = None, *, stream: Optional[TextIO] = None, **kwargs: Any) -> tqdm:
    """tqdm with the project's defaults; `stream` defaults to stderr."""
    stream = stream or sys.stderr
    if getattr(stream, "isatty", lambda: False)():
        return tqdm(iterable, file=stream, dynamic_ncols=True, **kwargs)
    return _PlainBar(iterable, file=_Lines(stream), mininterval=PLAIN_EVERY_S, maxinterval=PLAIN_EVERY_S,
                ncols=100, ascii=True, **kwargs)
