"""Batches on a Dask cluster started on 127.0.0.1 inside the test run give the same tables as local runs."""

from __future__ import annotations

import batch_fakes
import numpy as np
import pandas as pd
import pytest
import tifffile
from test_batch import _comparable, make_cfg, make_inputs, make_track_tables, table_cfg

from msdkit.batch import run_batch
from msdkit.errors import ConfigError

distributed = pytest.importorskip("distributed")

pytestmark = pytest.mark.distributed


@pytest.fixture(scope="module")
def scheduler_address():
    """A small cluster on loopback: one worker process-free (threads), TCP like an outside scheduler."""
    cluster = distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False, protocol="tcp",
                                       host="127.0.0.1", scheduler_port=0, dashboard_address="127.0.0.1:0")
    try:
        yield cluster.scheduler_address
    finally:
        cluster.close()


def test_dask_scheduler_on_loopback_gives_the_same_table_as_serial(tmp_path, scheduler_address):
    assert scheduler_address.startswith("tcp://127.0.0.1:")
    make_inputs(tmp_path / "in", n_good=3)
    serial = run_batch(make_cfg(tmp_path), output_dir=tmp_path / "serial", process=batch_fakes.fake_process,
                       progress=False)
    dask = run_batch(make_cfg(tmp_path, kind="dask", address=scheduler_address), output_dir=tmp_path / "dask",
                     process=batch_fakes.fake_process, progress=False)
    assert serial.exit_code == dask.exit_code == 1
    assert dask.n_ok == 3
    pd.testing.assert_frame_equal(_comparable(serial.table()), _comparable(dask.table()), check_exact=True)
    for stack in ("good0", "good1", "good2"):
        pd.testing.assert_frame_equal(pd.read_parquet(tmp_path / "serial" / stack / "tracks.parquet"),
                                      pd.read_parquet(tmp_path / "dask" / stack / "tracks.parquet"))


def test_real_pipeline_on_loopback_scheduler_gives_same_D_and_radius_as_serial(tmp_path, scheduler_address):
    make_track_tables(tmp_path / "in", seeds=(3,), broken=False)
    serial = run_batch(table_cfg(tmp_path), output_dir=tmp_path / "serial", progress=False)
    cfg = table_cfg(tmp_path, kind="dask", address=scheduler_address)
    dask = run_batch(cfg, output_dir=tmp_path / "dask", progress=False)
    assert serial.exit_code == dask.exit_code == 0
    for a, b in zip(serial.rows, dask.rows, strict=True):
        assert a.stack == b.stack
        assert b.D_um2_s == pytest.approx(a.D_um2_s, rel=1e-12)
        assert b.radius_nm == pytest.approx(a.radius_nm, rel=1e-12)
    pd.testing.assert_frame_equal(_comparable(serial.table()), _comparable(dask.table()), check_exact=False,
                                  rtol=1e-12)


def test_dask_batch_resumes_a_local_batch(tmp_path, scheduler_address, monkeypatch):
    # The executor is not part of the settings hash: results of a local run are reused on the cluster.
    make_inputs(tmp_path / "in", n_good=2)
    run_batch(make_cfg(tmp_path), process=batch_fakes.fake_process, progress=False)
    calls = tmp_path / "calls.txt"
    monkeypatch.setenv("MSDKIT_TEST_CALL_LOG", str(calls))
    result = run_batch(make_cfg(tmp_path, kind="dask", address=scheduler_address),
                       process=batch_fakes.fake_process, progress=False)
    assert {r.stack for r in result.rows if r.resumed} == {"good0", "good1"}
    assert not calls.exists()


def test_unreachable_scheduler_is_a_config_error(tmp_path, monkeypatch):
    from msdkit import executors

    monkeypatch.setattr(executors, "DASK_CONNECT_TIMEOUT_S", 2.0)
    rng = np.random.default_rng(0)
    (tmp_path / "in").mkdir()
    tifffile.imwrite(tmp_path / "in" / "a.tif", rng.integers(0, 100, (5, 8, 8), dtype=np.uint16))
    # Port 9 (discard) on loopback: nothing listens there on a test machine (common practice).
    cfg = make_cfg(tmp_path, kind="dask", address="tcp://127.0.0.1:9")
    with pytest.raises(ConfigError, match=r"cannot reach a Dask scheduler at 'tcp://127.0.0.1:9'"):
        run_batch(cfg, process=batch_fakes.fake_process, progress=False)


@pytest.mark.slow
def test_local_dask_cluster_started_on_demand_matches_serial(tmp_path):
    make_inputs(tmp_path / "in", n_good=2)
    serial = run_batch(make_cfg(tmp_path), output_dir=tmp_path / "serial", process=batch_fakes.fake_process,
                       progress=False)
    dask = run_batch(make_cfg(tmp_path, kind="dask", n_workers=2), output_dir=tmp_path / "dask",
                     process=batch_fakes.fake_process, progress=False)
    pd.testing.assert_frame_equal(_comparable(serial.table()), _comparable(dask.table()), check_exact=True)
