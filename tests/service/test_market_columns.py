"""Which factors the market regime uses (tracker.service.market.choose_columns)."""

from __future__ import annotations

from tracker.config import ConfigError, config_from_dict
from tracker.service.market import choose_columns

import pytest

ELIGIBLE = [f"F{i:02d}" for i in range(20)]
VAR = {f: (i % 7 + 1) * 1e-4 for i, f in enumerate(ELIGIBLE)}   # several ties


def _never():
    raise AssertionError("variances were read although no choice by volatility was needed")


def test_all_eligible_factors_up_to_the_cap():
    assert choose_columns(ELIGIBLE[:12], "auto", 12, None, _never) == ELIGIBLE[:12]


def test_the_most_volatile_beyond_the_cap_ties_by_name():
    got = choose_columns(ELIGIBLE, "auto", 5, None, lambda: VAR)
    ranked = sorted(ELIGIBLE, key=lambda f: (-VAR[f], f))[:5]
    assert got == sorted(ranked)
    assert all(VAR[f] >= max(VAR[g] for g in ELIGIBLE if g not in got) for f in got)


def test_a_fitted_set_stays_while_it_is_eligible():
    previous = ("F00", "F01", "F02", "F03", "F04")
    assert choose_columns(ELIGIBLE, "auto", 5, previous, _never) == list(previous)
    # one of them dropped out of the eligible set: choose again
    rest = [f for f in ELIGIBLE if f != "F02"]
    assert "F02" not in choose_columns(rest, "auto", 5, previous, lambda: VAR)


def test_an_explicit_list_is_kept_to_eligible_factors():
    assert choose_columns(ELIGIBLE, "F03, F01,NOPE", 2, None, _never) == ["F01", "F03"]


def test_config_keys_are_checked():
    assert config_from_dict({"models": {"market_factors_max": 3}}).models.market_factors_max == 3
    with pytest.raises(ConfigError, match="market_factors_max"):
        config_from_dict({"models": {"market_factors_max": 0}})
