"""Where the pieces of a flight run: this process, local cores, or a Dask cluster.

The cluster tests start a real ``distributed.LocalCluster`` on loopback (two worker
processes) and check that ``pvscan inspect`` and ``pvscan fleet`` give the same results
there as in a single process.
"""
from __future__ import annotations

import json
import math
import operator

import numpy as np
import pandas as pd
import pytest
from conftest import test_seed

from pvscan.errors import PvscanError
from pvscan.tasks import parse_scheduler, run_tasks

SEED = test_seed()


def test_parse_scheduler_names_and_addresses():
    assert parse_scheduler(None) is None
    assert parse_scheduler("single") is None
    for name in ("synchronous", "threads", "processes", "tcp://127.0.0.1:8786"):
        assert parse_scheduler(name) == name
    with pytest.raises(PvscanError, match="scheduler 'gpu'"):
        parse_scheduler("gpu")


@pytest.mark.parametrize("scheduler", [None, "synchronous", "threads", "processes"])
def test_run_tasks_returns_every_result_once(scheduler):
    args = [(k, 10 * k) for k in range(23)]
    got = dict(run_tasks(operator.add, args, scheduler, workers=2, per_worker=1))
    assert got == {k: 11 * k for k in range(23)}


def test_run_tasks_raises_a_task_error():
    with pytest.raises(ZeroDivisionError):
        list(run_tasks(operator.truediv, [(1, 1), (1, 0), (2, 1)], "threads", workers=2))


def test_unreachable_scheduler_is_a_one_line_error():
    pytest.importorskip("distributed")  # a test extra; installed by `make test`
    from pvscan.tasks import cluster

    # port 9 (discard) on loopback: nothing listens there on a test machine
    with pytest.raises(PvscanError, match="tcp://127.0.0.1:9: cannot connect"):
        with cluster("tcp://127.0.0.1:9", timeout_s=1.0):
            pass


# ---------------------------------------------------------------- a Dask cluster on loopback
def _scenario(name: str, lat: float) -> dict:
    return {"site": {"name": name, "lon": 9.5, "lat": lat},
            "array": {"table_rows": 3, "tables_per_row": 2, "rows": 2, "cols": 10},
            "defects": {"hot_cell": 2, "bypassed_substring": 1, "open_module": 1}}


@pytest.fixture(scope="module")
def local_cluster():
    distributed = pytest.importorskip("distributed")  # a test extra; installed by `make test`
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address="127.0.0.1:0", silence_logs=50) as lc:
        yield lc


@pytest.fixture(scope="module")
def flights(tmp_path_factory):
    from pvscan.simulate import simulate_flight

    root = tmp_path_factory.mktemp("cluster_flights")
    a = simulate_flight(_scenario("Cluster test north (invented)", 47.0), root / "a", seed=SEED)
    b = simulate_flight(_scenario("Cluster test south (invented)", -31.0), root / "b", seed=SEED + 1)
    return a.manifest, b.manifest


def _small_blocks():
    from pvscan.io.settings import load_pipeline

    # small blocks, so the statistics are many tasks spread over both workers
    return load_pipeline().replace(zonal={"block_px": 128})


def _same(res_a, res_b):
    cols = [c for c in res_a.modules.columns if c != "geometry"]
    pd.testing.assert_frame_equal(pd.DataFrame(res_a.modules[cols]), pd.DataFrame(res_b.modules[cols]),
                                  check_exact=True)
    assert res_a.modules.geometry.geom_equals_exact(res_b.modules.geometry, 0).all()
    pd.testing.assert_frame_equal(res_a.anomalies.drop(columns=["geometry"], errors="ignore"),
                                  res_b.anomalies.drop(columns=["geometry"], errors="ignore"), check_exact=True)


def test_inspect_on_a_local_cluster_equals_a_single_process(local_cluster, flights, tmp_path):
    from pvscan.io.manifest import load_flight
    from pvscan.io.ortho import open_orthos
    from pvscan.measure.zonal import _plan
    from pvscan.pipeline import inspect_flight

    settings = _small_blocks()
    flight = load_flight(flights[0])
    with open_orthos(flight.flight.orthos, flight.ortho, settings) as o:
        from pvscan.io.layout import read_layout

        mods = read_layout(flight, o.crs)
        frames = mods[["fx0", "fy0", "fux", "fuy", "fvx", "fvy"]].to_numpy()
        assert len(_plan(o, frames, (0.0, 0.0), 128)) >= 4  # really several tasks

    single = inspect_flight(flight, settings, tmp_path / "single", report=False)
    on_cluster = inspect_flight(flight, settings, tmp_path / "cluster", report=False,
                                scheduler=local_cluster.scheduler_address)
    _same(single, on_cluster)
    assert len(single.anomalies) >= 1
    assert single.summary["counts"] == on_cluster.summary["counts"]
    for name in ("modules.geojson", "anomalies.geojson", "workorders.csv"):
        assert (tmp_path / "single" / name).read_bytes() == (tmp_path / "cluster" / name).read_bytes(), name
    # and on local processes
    procs = inspect_flight(flight, settings, None, report=False, scheduler="processes")
    _same(single, procs)


def test_inspect_cli_with_a_scheduler_address(local_cluster, flights, tmp_path):
    from click.testing import CliRunner

    from pvscan.cli.main import cli

    r = CliRunner().invoke(cli, ["-q", "inspect", str(flights[1]), "--out", str(tmp_path / "out"),
                                 "--no-report", "--scheduler", local_cluster.scheduler_address])
    assert r.exit_code == 0, r.output
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert summary["counts"]["modules"] == 3 * 2 * 2 * 10  # table rows x tables x module rows x cols
    bad = CliRunner().invoke(cli, ["inspect", str(flights[1]), "--out", str(tmp_path / "bad"),
                                   "--scheduler", "gpu"])
    assert bad.exit_code == 1
    assert "scheduler 'gpu'" in bad.output
    assert not (tmp_path / "bad").exists()


def test_fleet_on_a_local_cluster_one_task_per_flight(local_cluster, flights, tmp_path):
    from pvscan.fleet import inspect_fleet

    on_cluster = inspect_fleet(list(flights), tmp_path / "cluster", scheduler=local_cluster.scheduler_address,
                               report=False)
    single = inspect_fleet(list(flights), tmp_path / "single", scheduler="synchronous", report=False)
    assert [o.ok for o in on_cluster] == [True, True]
    for a, b in zip(single, on_cluster):
        assert a.anomalies == b.anomalies
        assert math.isclose(a.power_loss_w, b.power_loss_w, rel_tol=0, abs_tol=0)
        mod_a = json.loads((tmp_path / "single").joinpath(a.out_dir, "modules.geojson").read_text())
        mod_b = json.loads((tmp_path / "cluster").joinpath(b.out_dir, "modules.geojson").read_text())
        assert mod_a == mod_b
    assert np.all([o.out_dir is not None for o in on_cluster])
