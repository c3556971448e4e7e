"""The Dask backend of ``trundle batch`` gives the same results as the local pool."""
import os

import pytest

distributed = pytest.importorskip("distributed")

from sim.runs.batch import find_scenarios, run_units  # noqa: E402
from sim.runs.cluster import run_units_dask  # noqa: E402

ROOT = os.path.join(os.path.dirname(__file__), "..")


def _comparable(results):
    return [{k: v for k, v in r.items() if k != "wall"} for r in results]


@pytest.mark.filterwarnings("ignore")
def test_local_cluster_on_loopback_matches_process_pool():
    units = find_scenarios([os.path.join(ROOT, "scenarios")])
    baselines = os.path.join(ROOT, "scenarios", "baselines")
    local = run_units(units, baselines, False, jobs=2)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        remote = run_units_dask(units, cluster.scheduler_address, baselines, False)
    assert _comparable(remote) == _comparable(local)
    assert all(r["result"] == "pass" for r in remote)


def test_unreachable_scheduler_is_an_input_error(capsys):
    from sim.cli import main
    code = main(["batch", os.path.join(ROOT, "scenarios", "ward-cart-arc.yaml"),
                 "--scheduler", "tcp://127.0.0.1:9"])
    assert code == 2
    assert "cannot reach the Dask scheduler" in capsys.readouterr().err
