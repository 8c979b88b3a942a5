"""The whole per-factor pipeline on real history: monthly US factors shipped by linearmodels.

Source: ``linearmodels.datasets.french`` (monthly, 1949-01 to 2017-03; MktRF is the market
excess return). The checks are facts of the trade (common practice): the long-run equity
premium is positive, and October 1987 and October 2008 were high-volatility months.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest

from tracker.config import config_from_dict
from tracker.service.factor_models import FactorTask, run_factor

french = pytest.importorskip("linearmodels.datasets.french")


@pytest.fixture(scope="module")
def market_run():
    data = french.load()
    dates = pd.to_datetime(data["dates"])
    y = data["MktRF"].to_numpy(float)
    settings = dataclasses.asdict(config_from_dict({}).models)
    out = run_factor(FactorTask("MKT", "monthly", dates.to_numpy().astype("datetime64[D]"), y, settings, refit=True))
    return dates, y, out


def test_every_model_fits(market_run):
    _, _, out = market_run
    assert [(f.model, f.status) for f in out.fits] == [
        ("volatility", "ok"), ("premium", "ok"), ("regimes", "ok"), ("regime_premium", "ok")]


def test_filtered_market_premium_is_positive_and_near_the_sample_mean(market_run):
    _, y, out = market_run
    premium, sd = out.premium[-1], np.sqrt(out.premium_var[-1])
    assert premium > 0
    assert abs(premium - y.mean()) <= 2 * sd


@pytest.mark.parametrize("month", ["1987-10", "2008-10"])
def test_high_volatility_regime_in_known_crises(market_run, month):
    dates, _, out = market_run
    probs = pd.DataFrame(out.regime_filtered, index=dates)
    # regime 1 is the high-volatility one (regimes are ordered calmest first)
    assert probs.loc[month, 1].iloc[0] > 0.5
    means = np.asarray(out.params["regimes"]["variances"])
    assert means[1] > means[0]
