"""Shared fixtures. The cluster services live in ``tests/services.py``."""

from __future__ import annotations

import os
from collections.abc import Iterator

# Under pytest-xdist each worker gets its share of the cores as OpenMP threads (PySCF, tblite
# and the subprocesses they start), unless OMP_NUM_THREADS is set already: two workers with two
# threads each on two cores oversubscribe them, and OpenMP barriers then wait for time slices
# (measured with CP2K beside a benchmark on both cores: a two-step campaign 627 s with 2 threads,
# 141 s with 1).
# Set before numpy, PySCF or libgomp are loaded, which read it once.
if os.environ.get("PYTEST_XDIST_WORKER_COUNT") and "OMP_NUM_THREADS" not in os.environ:
    _workers = int(os.environ["PYTEST_XDIST_WORKER_COUNT"])
    os.environ["OMP_NUM_THREADS"] = str(max(1, len(os.sched_getaffinity(0)) // _workers))

import pytest  # noqa: E402  (after the thread count is set)
from services import (  # noqa: E402
    ClusterUnavailable,
    SlurmCluster,
    Sshd,
    cluster_skip_reason,
    sshd_skip_reason,
)


@pytest.fixture(scope="session")
def slurm_cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[SlurmCluster]:
    """A single-node SLURM cluster (partition ``debug``, 2 CPUs, jobs run as root) with the
    PBS wrappers; ``/etc/slurm/slurm.conf`` is ours for the session. Skips with the reason when
    it cannot run here. Stopped (jobs cancelled, daemons ended, config restored) at session end.
    """
    reason = cluster_skip_reason()
    if reason:
        pytest.skip(reason)
    try:
        cluster = SlurmCluster.start(tmp_path_factory.mktemp("slurm"))
    except ClusterUnavailable as exc:
        pytest.skip(f"SLURM test cluster unavailable: {exc}")
    try:
        yield cluster
    finally:
        cluster.stop()


@pytest.fixture(scope="session")
def sshd_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Sshd]:
    """A second sshd on 127.0.0.1 (attributes host, port, user, key_file, known_hosts; method
    ``connect()`` gives a paramiko client). Skips with the reason when it cannot run here."""
    reason = sshd_skip_reason()
    if reason:
        pytest.skip(reason)
    try:
        server = Sshd.start(tmp_path_factory.mktemp("sshd"))
    except ClusterUnavailable as exc:
        pytest.skip(f"test sshd unavailable: {exc}")
    try:
        yield server
    finally:
        server.stop()


# Test files in order of their expected cost, the longest first. ``make test`` runs two
# pytest-xdist workers with ``--dist loadfile --no-loadscope-reorder``: each file goes whole to
# the next free worker in this order, so the long files start early and the short ones fill the
# end (longest-processing-time-first). xdist's own order, by the number of tests in a file,
# left the one-test DFT campaigns for last: one worker ran them for ~5 min while the other sat
# idle (measured on 2 cores: 29.3 min; in this order 27.8 min, 12 s above half the summed
# test time of 3,308 s). The estimate comes from the markers, so a new slow test moves its file
# up without a table to keep.
_COST = {"cluster": 120.0, "slow": 60.0}


def _expected_cost(item: pytest.Item) -> float:
    """A rough cost of one test (s): by its ``cluster`` or ``slow`` marker, else 1."""
    return max((c for m, c in _COST.items() if item.get_closest_marker(m)), default=1.0)


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    def file_of(item: pytest.Item) -> str:
        return item.nodeid.split("::", 1)[0]

    cost: dict[str, float] = {}
    for item in items:
        cost[file_of(item)] = cost.get(file_of(item), 0.0) + _expected_cost(item)
    # stable: tests keep their order inside a file, and files of equal cost their own order
    items.sort(key=lambda item: -cost[file_of(item)])
