"""Latency budgets as users write them."""
from __future__ import annotations


import pytest

from tightfit.errors import UserError
from tightfit.budgets import parse_budget


@pytest.mark.parametrize("text, ms", [
    ("0.3ms", 0.3), ("300us", 0.3), ("1.2 ms", 1.2), ("0.0012s", 1.2), ("2ms", 2.0), (" 450 us ", 0.45),
    ("1e-3s", 1.0), (".5ms", 0.5), ("250µs", 0.25),
])
def test_parse_budget_good(text, ms):
    # SI prefixes: 1 s = 1000 ms, 1 ms = 1000 µs (BIPM, The International System of Units, Table 7).
    assert parse_budget(text) == pytest.approx(ms, rel=1e-12)


@pytest.mark.parametrize("text", ["0.3", "ms", "fast", "0ms", "0.000us", "-1ms", "1.2 msec", "3 m", "", "1,5ms",
                                  "nanms", "infms"])
def test_parse_budget_bad_names_the_value(text):
    with pytest.raises(UserError) as err:
        parse_budget(text)
    assert repr(text) in str(err.value)


# ----------------------------------------------------------------------------- a synthetic problem
