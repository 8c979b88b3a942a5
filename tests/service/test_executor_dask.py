"""The Dask path: the same refit on a distributed cluster gives the serial executor's results.

A real ``distributed.LocalCluster`` with two worker processes (one thread each), so tasks
and results cross process boundaries by pickling, as on a remote cluster. Results must
be identical, not merely close: the executors only move the same deterministic tasks.
"""

from __future__ import annotations

import pandas as pd
import pytest

distributed = pytest.importorskip("distributed")

from tracker.service.bench_data import load_panel, make_panel  # noqa: E402
from tracker.service.estimate import update  # noqa: E402
from tracker.service.executor import DaskExecutor, SerialExecutor, executor_for  # noqa: E402
from tracker.store.bootstrap import open_store  # noqa: E402

TABLES = {
    "model_fits": "SELECT * EXCLUDE (fit_id, fitted_at) FROM model_fits ORDER BY subject_id, model",
    "premium_estimates": "SELECT * EXCLUDE (computed_at, fit_id) FROM premium_estimates ORDER BY ALL",
    "regime_estimates": "SELECT * EXCLUDE (computed_at, fit_id) FROM regime_estimates ORDER BY ALL",
    "warnings": "SELECT * EXCLUDE (computed_at) FROM warnings ORDER BY ALL",
    "filter_states": "SELECT subject_id, model, through_date, state_json FROM filter_states ORDER BY ALL",
}


@pytest.fixture(scope="module")
def cluster():
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as c:
        yield c


def _estimated(folder, executor):
    store, config = open_store(folder / "store.duckdb", create_demo=False)
    load_panel(store, make_panel(3, 400, seed=11))
    update(store, config, executor=executor)
    update(store, config, refit=set(), executor=executor)        # a warm refit of everything
    out = {}
    with store.connect() as con:
        for name, q in TABLES.items():
            out[name] = con.execute(q).df()
    return out


def _square(x):
    return x * x


def test_dask_executor_keeps_input_order(cluster):
    assert list(DaskExecutor(cluster.scheduler_address).map(_square, range(12))) == [i * i for i in range(12)]


def test_refit_on_dask_equals_serial(cluster, tmp_path):
    serial = _estimated(tmp_path / "serial", SerialExecutor())
    dask = _estimated(tmp_path / "dask", DaskExecutor(cluster.scheduler_address))
    assert len(serial["premium_estimates"]) == 3 * 400
    for name in TABLES:
        pd.testing.assert_frame_equal(serial[name], dask[name], check_exact=True, obj=name)


def test_config_key_selects_dask(cluster):
    from tracker.config import config_from_dict

    cfg = config_from_dict({"service": {"dask_scheduler": cluster.scheduler_address}})
    ex = executor_for(cfg)
    assert isinstance(ex, DaskExecutor) and ex.address == cluster.scheduler_address
    assert not isinstance(executor_for(config_from_dict({})), DaskExecutor)
