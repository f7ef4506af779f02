"""Fleet parallelism: results are byte-identical for --jobs 1, --jobs 2 and a local
dask.distributed cluster on loopback."""

from __future__ import annotations

import shutil

import pytest

from loopvet.results import dumps
from loopvet.run import Settings, check_fleet

from .conftest import ROOT, run_cli

SUBSET = ["thermal/pasteuriser-hot-water-temp.yaml", "motion/capper-turret-position.yaml",
          "process/homogeniser-pressure.yaml", "thermal/fermentation-tank-3-temp.yaml"]


@pytest.fixture
def fleet(tmp_path):
    for rel in SUBSET:
        dst = tmp_path / "designs" / rel
        dst.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy(ROOT / "designs" / rel, dst)
    (tmp_path / "designs" / "broken.yaml").write_text("loopvet: 1\nname: x\n")
    return tmp_path / "designs"


def test_jobs_give_identical_bytes(fleet, tmp_path):
    outs = []
    for jobs in ("1", "2"):
        out = tmp_path / f"out{jobs}"
        r = run_cli("check", str(fleet), "--out", str(out), "--jobs", jobs)
        assert r.returncode == 3, r.stderr
        outs.append((out / "results.json").read_bytes())
    assert outs[0] == outs[1]


def test_bad_jobs_is_a_usage_error():
    r = run_cli("check", "--jobs", "0")
    assert r.returncode == 2 and "expected at least 1" in r.stderr


def test_local_cluster_gives_identical_results(fleet):
    distributed = pytest.importorskip("dask.distributed")
    local = dumps(check_fleet(Settings(paths=(str(fleet),), jobs=1)).to_json())
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        remote = check_fleet(Settings(paths=(str(fleet),), cluster=cluster.scheduler_address))
    assert dumps(remote.to_json()) == local


def test_unreachable_cluster_is_a_usage_error(fleet):
    pytest.importorskip("dask.distributed")
    r = run_cli("check", str(fleet), "--cluster", "tcp://127.0.0.1:9", "--out", "/tmp/x")
    assert r.returncode == 2 and "cannot reach the cluster scheduler" in r.stderr
