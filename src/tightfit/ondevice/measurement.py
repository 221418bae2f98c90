"""One latency measurement as a record: the figure a budget is judged on, how it was pooled, how sure it is.

A runner's table entry, a search candidate, a pick, QA's re-measurement and the benchmark all hold the
same facts (ondevice/repeats.py makes them), so they share this record and its one fit rule:
a figure fits a budget when it is at most budget x (1 - guard). Standard library only: it runs on the
device. On disk the record keeps the keys the files have always had (``budget_stat_ms`` for the figure).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Optional

FIGURE_KEY = "budget_stat_ms"        # on disk: the percentile of the pooled runs a budget is judged on
PERCENTILE_KEY = "budget_percentile"  # on disk: which percentile that is
_STATS = ("p50_ms", "p90_ms", "p99_ms", "mean_ms", "min_ms", "max_ms", "cv", "iqr_over_median")


@dataclass(frozen=True)
class SpeedStates:
    """Whether the runs fell into a faster and a slower speed state, in words a QA engineer can act on."""
    two_states: bool = False
    slow_share: float = 0.0       # share of runs in the slower state
    slow_over_fast: float = 1.0   # the slower state's median over the faster one's
    text: str = "one speed state"

    def to_dict(self) -> dict[str, Any]:
        return {"two_states": self.two_states, "slow_share": self.slow_share,
                "slow_over_fast": self.slow_over_fast, "text": self.text}

    @classmethod
    def from_dict(cls, d: Any) -> SpeedStates:
        """As to_dict wrote it; anything else (an older file without it) reads as one state."""
        if not isinstance(d, dict):
            return cls()
        return cls(bool(d.get("two_states", False)), float(d.get("slow_share", 0.0)),
                   float(d.get("slow_over_fast", 1.0)), str(d.get("text", "one speed state")))


@dataclass(frozen=True)
class Measurement:
    """A model's latency pooled over fresh-process repeats (milliseconds)."""
    figure_ms: float                  # the protocol's percentile of all pooled runs: what a budget is judged on
    percentile: float
    p50_ms: float
    p90_ms: float
    p99_ms: float
    mean_ms: float
    min_ms: float
    max_ms: float
    cv: float
    iqr_over_median: float
    runs: int                         # timed runs pooled
    repeat_figures_ms: tuple[float, ...] = ()   # each repeat's own percentile
    repeat_spread: Optional[float] = None       # their range over the figure; None with one repeat
    guard: Optional[float] = None               # share a later measurement may add (repeats.guard_from_spread)
    states: SpeedStates = SpeedStates()
    stable: bool = False
    note: str = ""
    repeats: tuple[dict[str, Any], ...] = field(default=(), compare=False)  # per-repeat summaries, raw

    def __post_init__(self) -> None:
        if not (math.isfinite(self.figure_ms) and self.figure_ms >= 0):
            raise ValueError(f"a latency figure is a finite number of ms >= 0, got {self.figure_ms!r}")
        if not 0 < self.percentile <= 100:
            raise ValueError(f"percentile must be in (0, 100], got {self.percentile!r}")
        if self.guard is not None and not self.guard >= 0:
            raise ValueError(f"guard is a share of the figure >= 0, got {self.guard!r}")

    def fits(self, budget_ms: float, guard: float = 0.0) -> bool:
        """The fit rule: the figure at most budget x (1 - guard). Guard 0 is the verdict (a budget is met
        at or under it); a search passes the guard a pick must leave free so a later measurement fits too."""
        return self.figure_ms <= budget_ms * (1.0 - guard)

    def use(self, budget_ms: Optional[float]) -> Optional[float]:
        """How much of its budget the figure uses (figure / budget); None without a budget."""
        return None if not budget_ms else round(self.figure_ms / budget_ms, 4)

    def to_dict(self) -> dict[str, Any]:
        return {FIGURE_KEY: self.figure_ms, PERCENTILE_KEY: self.percentile,
                **{k: getattr(self, k) for k in _STATS}, "runs": self.runs,
                "repeat_figures_ms": list(self.repeat_figures_ms), "repeat_spread": self.repeat_spread,
                "guard": self.guard, "states": self.states.to_dict(), "stable": self.stable, "note": self.note,
                "repeats": [dict(r) for r in self.repeats]}

    @classmethod
    def from_dict(cls, d: Any) -> Optional[Measurement]:
        """As to_dict wrote it (other keys, such as a table entry's kind and file, are ignored); None for
        None (not measured). A record missing a figure is a damaged file: ValueError naming the key."""
        if d is None:
            return None
        if not isinstance(d, dict):
            raise ValueError(f"a measurement is an object, got {type(d).__name__}")
        missing = [k for k in (FIGURE_KEY, PERCENTILE_KEY, *_STATS, "runs") if k not in d]
        if missing:
            raise ValueError(f"the measurement lacks {missing[0]!r}")
        guard = d.get("guard")
        return cls(float(d[FIGURE_KEY]), float(d[PERCENTILE_KEY]), *(float(d[k]) for k in _STATS), int(d["runs"]),
                   tuple(float(f) for f in d.get("repeat_figures_ms") or ()),
                   None if d.get("repeat_spread") is None else float(d["repeat_spread"]),
                   float(guard) if isinstance(guard, (int, float)) and not isinstance(guard, bool) else None,
                   SpeedStates.from_dict(d.get("states")), bool(d.get("stable", False)), str(d.get("note") or ""),
                   tuple(dict(r) for r in d.get("repeats") or ()))


def figure_of(record: Any) -> Optional[float]:
    """The figure a stored measurement was judged on (a pick row's ``measured``, a verdict's, a manifest's
    latency), for readers that tolerate partial or missing files (the report); None when there is none."""
    value = record.get(FIGURE_KEY) if isinstance(record, dict) else None
    return float(value) if isinstance(value, (int, float)) and not isinstance(value, bool) else None
