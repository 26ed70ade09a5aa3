"""A build on a real Dask cluster: a `dask scheduler` and two `dask worker` processes started on
loopback, as an owner starts them, not an in-process cluster. The corpus is partitioned (members in
three line files, lookups in four Parquet files): the workers read it (tamis.cluster_corpus), run
every chunk task, and train through LightGBM's Dask interface.

What may differ from a local build is the model: LightGBM's distributed training bins and sums
across workers, so its trees are not bit-identical to a local run's. The corpus, its split and its
verification are the same; the guarantees must hold all the same: zero false negatives, the gate,
and answers whose false-positive rate agrees with the local build's within the sampling error.
External reference: the normal approximation of the difference of two binomial proportions
(common practice), at 4 standard errors.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import polars as pl
import pytest

for _module in ("dask", "distributed", "prefect_dask", "pandas", "sklearn"):
    pytest.importorskip(_module, reason=f"the cluster path needs {_module} (pip install 'tamis[cluster]')")

from small_build import small_config, write_corpus  # noqa: E402

from tamis.config import ComputeSettings  # noqa: E402
from tamis.loader import open_filter  # noqa: E402

START_SECONDS = 30  # a scheduler and its workers answer within a few seconds on this machine


def _dask(*args: str, log: Path) -> subprocess.Popen:
    """One dask command-line process (its output in `log`)."""
    command = [str(Path(sys.executable).with_name("dask")), *args]
    return subprocess.Popen(command, stdout=log.open("wb"), stderr=subprocess.STDOUT, env=os.environ.copy())


def _stop(process: subprocess.Popen) -> None:
    """Stop one process we started, by its own pid."""
    if process.poll() is None:
        process.terminate()
        try:
            process.wait(timeout=15)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait()


@pytest.fixture(scope="module")
def scheduler(tmp_path_factory):
    """The address of a scheduler with two single-threaded worker processes (no nanny: each worker
    is the process we started), all on 127.0.0.1, no dashboards; stopped by their pids."""
    folder = tmp_path_factory.mktemp("dask")
    address_file = folder / "scheduler.json"
    processes = [_dask("scheduler", "--host", "127.0.0.1", "--port", "0", "--no-dashboard",
                       "--scheduler-file", str(address_file), log=folder / "scheduler.log")]
    try:
        deadline = time.monotonic() + START_SECONDS
        while not address_file.exists():
            assert processes[0].poll() is None and time.monotonic() < deadline, (folder / "scheduler.log").read_text()
            time.sleep(0.2)
        for i in range(2):
            processes.append(_dask("worker", "--scheduler-file", str(address_file), "--host", "127.0.0.1", "--no-nanny",
                                   "--nthreads", "1", "--no-dashboard", "--memory-limit", "3GiB", "--name", f"w{i}",
                                   log=folder / f"worker{i}.log"))
        address = json.loads(address_file.read_text())["address"]
        from distributed import Client

        with Client(address, timeout=START_SECONDS) as client:
            client.wait_for_workers(2, timeout=START_SECONDS)
        yield address
    finally:
        for process in reversed(processes):
            _stop(process)
    assert all(process.poll() is not None for process in processes)


def _partition(members: Path, lookups: Path, into: Path) -> tuple[Path, Path]:
    """The members file as three line files, the lookups table as four Parquet files."""
    member_parts, lookup_parts = into / "members", into / "lookups"
    member_parts.mkdir(parents=True)
    lookup_parts.mkdir()
    lines = members.read_bytes().splitlines(keepends=True)
    for i in range(3):
        (member_parts / f"part-{i}.txt").write_bytes(b"".join(lines[i::3]))
    table = pl.read_parquet(lookups)
    cut = np.linspace(0, table.height, 5).astype(int)
    for i in range(4):
        table.slice(cut[i], cut[i + 1] - cut[i]).write_parquet(lookup_parts / f"part-{i}.parquet")
    return member_parts, lookup_parts


def test_a_build_on_a_real_scheduler_reads_its_partitions_on_the_workers_and_keeps_the_guarantees(scheduler, tmp_path, monkeypatch):
    import tamis.flows.build as build

    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1700000000")
    members, lookups = _partition(*write_corpus(tmp_path / "corpus"), tmp_path / "parts")
    local_config = small_config(members, lookups, tmp_path / "local")
    config = dataclasses.replace(small_config(members, lookups, tmp_path / "cluster"),
                                 compute=ComputeSettings(chunk_keys=6000, cluster=scheduler))
    on_cluster = build.flow_for(config)(config)
    local = build.build_flow(local_config)

    report = on_cluster.report
    assert report["corpus"]["read"]["by"] == "workers"
    assert report["corpus"]["read"]["partitions"] == {"members": 3, "non_members": 4}
    assert on_cluster.published and report["gate"]["passed"] and report["false_negatives"] == 0
    assert report["heldout"]["fpr_upper"] <= report["target_fpr"]
    # the same corpus, split and verification counts as the local build's
    assert report["provenance"]["corpus_digest"] == local.report["provenance"]["corpus_digest"]
    assert report["corpus"]["split"] == local.report["corpus"]["split"]
    assert report["heldout"]["keys"] == local.report["heldout"]["keys"]

    cluster_filter = open_filter(config.store.path)  # the stores, opened as a service opens them
    local_filter = open_filter(local_config.store.path)
    member_keys = [line for part in sorted(members.iterdir()) for line in part.read_bytes().splitlines()]
    assert cluster_filter.contains_many(member_keys).all() and local_filter.contains_many(member_keys).all()
    # every distinct non-member looked up, answered by both: rates within 4 standard errors
    others = sorted(set(pl.read_parquet(lookups)["key"].cast(pl.Binary).to_list()) - set(member_keys))
    rates = [float(np.mean(opened.contains_many(others))) for opened in (cluster_filter, local_filter)]
    error = math.sqrt(sum(rate * (1 - rate) for rate in rates) / len(others))
    assert abs(rates[0] - rates[1]) <= 4 * error + 1 / len(others), (rates, error)
