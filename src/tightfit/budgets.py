"""Latency budgets as users write them ('0.3ms', '300us') and as folders name them."""
from __future__ import annotations

import re

from tightfit.errors import UserError

_UNITS = {"s": 1000.0, "ms": 1.0, "us": 1e-3, "µs": 1e-3}
_BUDGET_RE = re.compile(r"^\s*([0-9]*\.?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*(s|ms|us|µs)\s*$")


def parse_budget(text: str) -> float:
    """'0.3ms', '300us', '1.2 ms', '0.0012s' → milliseconds; anything else is a UserError."""
    m = _BUDGET_RE.match(str(text))
    if not m:
        raise UserError(f"budget {text!r} is not a duration: write it like 0.3ms, 300us or 0.0012s")
    ms = float(m.group(1)) * _UNITS[m.group(2)]
    if not ms > 0:
        raise UserError(f"budget {text!r} must be greater than zero: write it like 0.3ms")
    return ms


def budget_label(ms: float) -> str:
    return f"{ms:.6g}ms"
