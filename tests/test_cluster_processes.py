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
import math
from pathlib import Path

import numpy as np
import polars as pl
import pytest

for _module in ("dask", "distributed", "prefect_dask", "pandas", "sklearn"):
    pytest.importorskip(_module, reason=f"the cluster path needs {_module} (pip install 'tamis[cluster]')")

from dask_processes import dask_cluster  # noqa: E402
from small_build import small_config, write_corpus  # noqa: E402

from tamis.config import ComputeSettings  # noqa: E402
from tamis.loader import open_filter  # noqa: E402


@pytest.fixture(scope="module")
def scheduler(tmp_path_factory):
    """The address of a scheduler with two single-threaded worker processes on 127.0.0.1."""
    with dask_cluster(tmp_path_factory.mktemp("dask"), workers=2) as started:
        yield started.address
    assert all(process.returncode is not None for process in started.processes.values())


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
    assert report["corpus"]["read"]["driver_keys"] == report["corpus"]["members"] + report["corpus"]["non_members"]
    assert report["memory"]["peak_rss_bytes"] > 0

    cluster_filter = open_filter(config.store.path)  # the stores, opened as a service opens them
    local_filter = open_filter(local_config.store.path)
    member_keys = [line for part in sorted(members.iterdir()) for line in part.read_bytes().splitlines()]
    assert cluster_filter.contains_many(member_keys).all() and local_filter.contains_many(member_keys).all()
    # every distinct non-member looked up, answered by both: rates within 4 standard errors
    others = sorted(set(pl.read_parquet(lookups)["key"].cast(pl.Binary).to_list()) - set(member_keys))
    rates = [float(np.mean(opened.contains_many(others))) for opened in (cluster_filter, local_filter)]
    error = math.sqrt(sum(rate * (1 - rate) for rate in rates) / len(others))
    assert abs(rates[0] - rates[1]) <= 4 * error + 1 / len(others), (rates, error)
