"""The corrected second search of a budget: when a verified pick leaves too much of its budget
unused, and where to search again (the guard its measured candidates needed, their measured over
predicted latency)."""
from __future__ import annotations

from typing import Optional

from tightfit.export.pick import Pick
from tightfit.search.choice_rule import DEFAULT_GUARD
from tightfit.search.settings import SearchSettings


def expected_guard(settings: SearchSettings) -> float:
    """The guard to centre the search on before anything is measured: --guard, else the usual one."""
    return DEFAULT_GUARD if settings.guard is None else settings.guard


UNDER_USE = 0.85  # a verified pick below this share of its budget triggers one corrected search


def centre_guard(pick: Pick, settings: SearchSettings) -> float:
    """The guard a corrected search centres on: what the candidates measured for ``pick`` needed (their
    median), else the expected one."""
    typical = None if pick.guard is None else pick.guard.typical
    return expected_guard(settings) if typical is None else typical


DEAD_BAND = 0.03  # a corrected limit closer than this to the one searched finds nothing new
# Guards this wide say the repeats were noise, not where subnets fit: no correction. (Two repeats on a
# loaded 2-core host gave a median guard over 100 % and a negative limit, commit ec24717.)
NOISE_GUARD = 0.5


def corrected_limit(pick: Pick, budget_ms: float, guard: float, slack: float, limit_ms: float,
                    fell_back: bool = False) -> Optional[tuple[float, float]]:
    """Where a verified pick uses less than UNDER_USE of its budget: the (limit, usable) of one
    corrected search, usable = budget x (1 - guard) / measured-over-predicted and the limit ``slack``
    above it, unless that limit is within 3 % of the ``limit_ms`` searched (else None). The first
    search centred on the expected guard and on the table's time; the measured candidates say what
    they needed. A ratio below 1 (the predictor overestimated) widens the search to faster-than-
    predicted, more accurate subnets; above 1, or guards wider than expected, narrow it to where
    candidates now fit (the first search's all sat in a band just under its limit, and a miss there
    fell far below them). A pick that ``fell_back`` to the smallest subnet had every candidate under
    the limit fail: the search goes at least DEAD_BAND lower (the demo at 7eeba9a: one candidate's
    spiky 32 % guard sank the band, and the others' 2 % median moved the limit by 1.4 %)."""
    ratio = pick.measured_over_predicted
    if not (pick.measurement and pick.fits and ratio) or pick.use() >= UNDER_USE or guard >= NOISE_GUARD:
        return None
    usable = budget_ms * (1 - guard) / ratio
    if fell_back:
        usable = min(usable, (1 - DEAD_BAND) * limit_ms / (1 + slack))
    new = usable * (1 + slack)
    return (new, usable) if abs(new / limit_ms - 1) > DEAD_BAND - 1e-9 else None
