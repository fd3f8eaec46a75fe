"""Export on a loopback Dask cluster with faults: a worker killed mid-export (Dask runs its
task again elsewhere), and the client killed and started again at once while the cluster
still finishes the first client's tasks. The dataset ends with every frame exactly once,
equal to an uninterrupted local run."""

from __future__ import annotations

import signal
import subprocess
import sys
import time

import _faultkit
import pytest
from _faultkit import EXPORT_OPTIONS, RUNNER, same_dataset

from timbrel.export import export

distributed = pytest.importorskip("distributed")
cloudpickle = pytest.importorskip("cloudpickle")
import _dask_hooks  # noqa: E402  (sent to the workers by value, they cannot import it)

cloudpickle.register_pickle_by_value(_dask_hooks)

reference = _faultkit.reference  # the shared fixture


@pytest.fixture
def cluster():
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as cluster, \
            distributed.Client(cluster) as client:
        yield cluster, client


def _settle(client, timeout: float = 60.0) -> None:
    """Wait until no worker runs a task: a killed client's tasks run on to their end."""
    deadline = time.monotonic() + timeout
    while any(client.run(_dask_hooks.busy).values()):
        assert time.monotonic() < deadline, "the cluster never went idle"
        time.sleep(0.05)


def test_a_worker_killed_mid_export(tmp_path, reference, cluster):
    cluster, client = cluster
    client.run(_dask_hooks.plant, str(tmp_path), 0.0, True)
    out = tmp_path / "ds"
    export(reference / "audio", reference / "model.npz", out, pool=["mean", "max"],
           scheduler=cluster.scheduler_address)
    assert (tmp_path / "killed").exists()  # one worker did die at its first part
    same_dataset(out, reference / "ds")


def test_the_client_killed_and_started_again(tmp_path, reference, cluster):
    cluster, client = cluster
    client.run(_dask_hooks.plant, str(tmp_path), 0.3, False)  # every part takes 0.3 s more
    out = tmp_path / "ds"
    args = ["export", reference / "audio", "--model", reference / "model.npz", "--out", out,
            "-q", "--scheduler", cluster.scheduler_address, *EXPORT_OPTIONS]
    first = subprocess.Popen([sys.executable, str(RUNNER), "none", *map(str, args)],
                             start_new_session=True, stdout=subprocess.DEVNULL,
                             stderr=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 120
        while not any(out.glob("part-*.parquet")):
            assert first.poll() is None, "the first client finished before the kill"
            assert time.monotonic() < deadline
            time.sleep(0.01)
    finally:
        first.send_signal(signal.SIGKILL)
        first.wait()
    # started at once, while the cluster still runs the first client's tasks
    export(reference / "audio", reference / "model.npz", out, pool=["mean", "max"],
           scheduler=cluster.scheduler_address)
    _settle(client)
    same_dataset(out, reference / "ds")
