"""Tests of builds on a Dask cluster: LightGBM's own Dask interface trains, we price; the whole flow
runs its chunk tasks on the workers.

A local Dask cluster of two worker processes starts in-process for the module. The corpus is a
small Emberfall demo corpus (tamis.demo). External references: the LightGBM Python package
(4.x) itself, whose `Booster.predict` a compiled Dask-trained booster must reproduce; the exact
binomial (Clopper-Pearson, Biometrika 1934) lower bound, through scipy.stats.beta, for the
held-out false-positive rate.
"""

from __future__ import annotations

import collections
import dataclasses
import math

import numpy as np
import pytest
from scipy import stats

# LightGBM's Dask interface needs dask, distributed, pandas and scikit-learn
for _module in ("dask", "distributed", "pandas", "sklearn"):
    pytest.importorskip(_module, reason=f"the cluster path needs {_module} (pip install dask distributed pandas scikit-learn)")

from distributed import Client, LocalCluster, get_task_stream  # noqa: E402
from small_build import small_config, write_corpus  # noqa: E402
from test_model import assert_budget_and_patience  # noqa: E402
from test_trees import assert_matches_lightgbm  # noqa: E402

from tamis import publish  # noqa: E402
from tamis.config import ComputeSettings  # noqa: E402
from tamis.demo import generate_demo_corpus  # noqa: E402
from tamis.errors import BadInput  # noqa: E402
from tamis.features import default_feature_spec, featurize  # noqa: E402
from tamis.filters import build_filters  # noqa: E402
from tamis.loader import open_filter  # noqa: E402
from tamis.booster import compile_booster  # noqa: E402
from tamis.config import ModelSettings  # noqa: E402
from tamis.model import (  # noqa: E402
    FOREST_OVERHEAD_BYTES,
    fit_model,
    fit_model_on_cluster,
    scatter_rows,
    train_on_cluster,
)
from tamis.package import package_artifact  # noqa: E402
from tamis.query import region_of  # noqa: E402
from tamis.regions import RegionSettings, plan_regions  # noqa: E402
from tamis.trees import Forest, score_batch  # noqa: E402
from tamis.verify import Strata, every_path_answers, path_sample, verification  # noqa: E402

TARGET_FPR = 0.02
REGIONS = RegionSettings(segments=256)
# Two candidates, each priced every 4 trees up to its cap (20 trees of 15 leaves, 8 of 31).
SETTINGS = ModelSettings(leaves=(15, 31), learning_rates=(0.5,), max_trees=20, max_nodes_per_key=240,
                         checkpoint_every=4, patience=2, train_nonmembers=20_000, threads=1)


def filter_bytes(member_scores, val_scores, val_weights) -> float:
    """The flow's price of the backup filters: the region plan's estimated bits, in bytes."""
    return plan_regions(member_scores, val_scores, val_weights, TARGET_FPR, REGIONS).estimated_total_bits / 8


@pytest.fixture(scope="module")
def client():
    # processes: each LightGBM machine in a process of its own, as on a real cluster; no dashboard, so no port
    # to clash with another test run. LightGBM's own ports are free ones each worker finds.
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        with Client(cluster) as connected:
            yield connected


@pytest.fixture(scope="module")
def corpus():
    """5,000 banned handles; the 50,000 looked-up handles dealt into training, validation and
    held-out thirds. Validation and held-out keys count once each, so the false-positive rate
    is by distinct keys."""
    demo = generate_demo_corpus(members=5000, non_members=50_000, seed=3)
    spec = default_feature_spec()
    members = [key.encode() for key in demo.member_keys]
    others = [key.encode() for key in demo.nonmember_keys]
    train, validation, heldout = (others[i::3] for i in range(3))
    return {
        "spec": spec,
        "members": members,
        "heldout": heldout,
        "X": {
            "X_members": featurize(members, spec),
            "X_train_non": featurize(train, spec),
            "w_train_non": demo.nonmember_counts[0::3].astype(np.float64),
            "X_val_non": featurize(validation, spec),
            "w_val_non": np.ones(len(validation)),
        },
    }


@pytest.fixture(scope="module")
def cluster_choice(client, corpus):
    return fit_model_on_cluster(client, **corpus["X"], filter_bytes=filter_bytes, settings=SETTINGS)


def test_cluster_choice_is_a_valid_compiled_forest_within_the_budget(cluster_choice):
    forest = cluster_choice.forest
    assert cluster_choice.trees == forest.trees > 0
    again = Forest.from_parts(forest.meta(), forest.sections())  # the loader's checks of a forest
    assert again.meta() == forest.meta()
    assert cluster_choice.params["leaves"] in SETTINGS.leaves
    assert_budget_and_patience(cluster_choice, SETTINGS)


def test_cluster_choice_prices_like_its_forest_priced_here(corpus, cluster_choice):
    forest, X = cluster_choice.forest, corpus["X"]
    member_scores, val_scores = score_batch(forest, X["X_members"]), score_batch(forest, X["X_val_non"])
    assert cluster_choice.filter_bytes == filter_bytes(member_scores, val_scores, X["w_val_non"])
    assert cluster_choice.model_bytes == forest.nbytes + FOREST_OVERHEAD_BYTES
    assert cluster_choice.total_bytes == cluster_choice.model_bytes + cluster_choice.filter_bytes
    assert cluster_choice.total_bytes == min(row["total_bytes"] for row in cluster_choice.candidates)


def test_compiled_dask_booster_reproduces_lightgbm(client, corpus):
    X = corpus["X"]
    rows = np.vstack([X["X_members"], X["X_train_non"]])
    labels = np.r_[np.ones(len(X["X_members"])), np.zeros(len(X["X_train_non"]))]
    weights = np.r_[np.ones(len(X["X_members"])), np.log1p(X["w_train_non"])]
    params = {"objective": "binary", "num_leaves": 31, "learning_rate": 0.3, "max_bin": 63, "verbose": -1,
              "seed": 1, "deterministic": True, "force_col_wise": True}
    data = scatter_rows(client, rows, labels, weights)
    booster = train_on_cluster(data, params, trees=12)
    assert booster.num_trees() == 12
    assert_matches_lightgbm(booster, compile_booster(booster), X["X_val_non"])
    # the same rows on the same workers give the same trees (without tamis.model's sorted
    # machine numbering, this failed in 3 runs of 3)
    for _ in range(3):
        assert train_on_cluster(data, params, trees=12).dump_model()["tree_info"] == booster.dump_model()["tree_info"]


def test_every_worker_gets_both_labels_even_when_one_is_rarer_than_the_workers(client):
    """LightGBM's Dask interface trains one classifier per worker on that worker's rows; one that
    saw a single label would learn it as label 0."""
    rows = np.arange(40, dtype=np.float32).reshape(20, 2)
    for members in (1, 2, 7):
        labels = (np.arange(20) >= 20 - members).astype(np.float64)
        data = scatter_rows(client, rows, labels, np.ones(20))
        part_labels = [client.compute(chunk).result() for chunk in data.labels.to_delayed()]  # one chunk a worker
        assert len(part_labels) == min(members, 2)
        assert all(set(part.tolist()) == {0.0, 1.0} for part in part_labels)
        assert sorted(np.concatenate(part_labels).tolist()) == sorted(labels.tolist())


def test_cluster_model_separates_bots_from_players_as_well_as_a_local_one(corpus, cluster_choice):
    baseline = cluster_choice.candidates[0]  # no trees: one plain Bloom filter
    assert baseline["trees"] == 0
    assert cluster_choice.total_bytes < 0.7 * baseline["total_bytes"]
    assert cluster_choice.auc > 0.95
    # distributed LightGBM bins and sums across workers, so its trees differ from a local run's,
    # but not its quality: the chosen totals agree within 10%
    local = fit_model(**corpus["X"], filter_bytes=filter_bytes, settings=SETTINGS)
    assert abs(cluster_choice.total_bytes - local.total_bytes) <= 0.1 * local.total_bytes


def test_cluster_model_builds_a_filter_with_no_false_negative_and_its_target_rate(tmp_path, corpus, cluster_choice):
    forest, X = cluster_choice.forest, corpus["X"]
    member_scores = score_batch(forest, X["X_members"])
    plan = plan_regions(member_scores, score_batch(forest, X["X_val_non"]), X["w_val_non"], TARGET_FPR, REGIONS)
    filters = build_filters(corpus["members"], region_of(member_scores, plan.boundaries), plan.fprs, 0x5EED)
    path = tmp_path / "cluster.tamis"
    package_artifact(path, feature_spec=corpus["spec"], forest=forest, boundaries=plan.boundaries, region_filters=filters,
                     hash_seed=0x5EED, provenance={"built_at": "2026-12-01T00:00:00Z", "build_id": "cluster"})
    heldout = np.ones(len(corpus["heldout"]), dtype=np.int64)
    loaded = open_filter(path)
    assert loaded.contains_many(corpus["members"]).all()
    no_heavy = np.zeros(0, dtype=np.int64)
    window = Strata(tau=44, lookups=3 * len(heldout), heavy_counts=no_heavy, tail_lookups=3 * len(heldout),
                    tail_max_count=1, heldout_counts=heldout)
    checked = verification(every_path_answers(loaded, corpus["members"]), every_path_answers(loaded, path_sample(corpus["heldout"])),
                           np.zeros(0, dtype=bool), loaded.contains_many(corpus["heldout"]), window, 0.95)
    assert checked.false_negatives == 0 and checked.members_checked == len(corpus["members"])
    # the held-out rate is not above the target: the 99% Clopper-Pearson lower bound of the
    # measured false positives among distinct held-out keys is at or below it
    k, n = checked.heldout.false_positive_keys, checked.heldout.keys
    assert k > 0 and stats.beta.ppf(0.01, k, n - k + 1) <= TARGET_FPR


CHUNK = 4_000  # keys a chunk task of the whole-flow build: several chunks a part


def test_a_build_on_the_cluster_keeps_the_invariants_and_the_bytes_of_a_local_build(client, tmp_path, monkeypatch):
    """The whole flow with compute.cluster: chunk tasks on the workers through Prefect's Dask task
    runner, training through LightGBM's Dask interface. Given the same model, a build on this
    machine writes the very same bytes: chunks are computed on their own, filter bits merge by OR."""
    import tamis.flows.build as build

    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1700000000")
    members, lookups = write_corpus(tmp_path / "corpus")
    chosen = []

    def recorded(*args):
        chosen.append(fit_model_on_cluster(*args))
        return chosen[-1]

    monkeypatch.setattr(build, "fit_model_on_cluster", recorded)
    config = dataclasses.replace(
        small_config(members, lookups, tmp_path / "cluster"),
        compute=ComputeSettings(chunk_keys=CHUNK, cluster=client.scheduler.address),
    )
    with get_task_stream(client) as stream:
        on_cluster = build.flow_for(config)(config)
    report = on_cluster.report
    assert on_cluster.published and report["false_negatives"] == 0
    assert report["heldout"]["fpr_upper"] <= report["target_fpr"]
    # every chunk task ran on the workers, once a chunk (Dask names a task by its function)
    ran = collections.Counter(str(task["key"]).rsplit("-", 1)[0] for task in stream.data)
    split, member_count = report["corpus"]["split"], report["corpus"]["members"]
    trained = report["model"]["params"]["train_nonmembers"]  # the training sample

    def chunks(*parts: int) -> int:
        return sum(math.ceil(keys / CHUNK) for keys in parts)

    # the training rows are the light training sample and every heavy key
    light_trained = trained - split["heavy"]
    assert ran["featurize_chunk"] == chunks(member_count, light_trained, split["validation"], split["check"], split["heavy"])
    assert ran["score_chunk"] == chunks(member_count, split["validation"], split["check"], split["heavy"])
    # once a plan settled (tamis.planning), for the learned artifact and the plain filter
    plans = len(report["plan"]["rounds"]) + len(report["plain_filter"]["plan"]["rounds"])
    assert ran["fill_chunk"] == plans * chunks(member_count)
    # members and a sample of held-out keys through every answer path, every held-out key through the service's
    sampled = len(path_sample(list(range(split["heldout"]))))
    assert ran["answer_chunk"] == chunks(member_count, sampled) + chunks(split["heavy"], split["heldout"])
    assert len(chosen) == 1

    monkeypatch.setattr(build, "fit_model", lambda *args: chosen[0])
    local = build.build_flow(small_config(members, lookups, tmp_path / "local"))
    artifact = publish.ARTIFACT_NAME
    assert (on_cluster.folder / artifact).read_bytes() == (local.folder / artifact).read_bytes()


def test_a_scheduler_that_does_not_answer_is_bad_input_before_any_work():
    import tamis.flows.build as build

    with pytest.raises(BadInput, match="cannot reach the Dask scheduler at 'tcp://127.0.0.1:9'"):
        build.check_cluster("tcp://127.0.0.1:9")


def test_the_workers_read_the_partitions_into_the_very_corpus_of_a_local_read(client, tmp_path):
    """Partitions read, deduplicated and checked for conflicts on the workers, bucket by bucket:
    the same keys in the same order with the same counts and split as tamis.corpus.load_corpus."""
    from test_corpus import _partitioned, assert_same_corpus

    from tamis.cluster_corpus import load_corpus_on_cluster
    from tamis.config import CorpusSettings
    from tamis.corpus import load_corpus

    paths = _partitioned(tmp_path)
    settings = CorpusSettings()
    looked_up = pl_first_key(paths["whole_lookups"])
    added = [b"added-later", looked_up, b"added-later"]  # an added member looked up: a conflict, no label error
    local = load_corpus(paths["members"], paths["lookups"], settings, added)
    on_cluster = load_corpus_on_cluster(client, paths["members"], paths["lookups"], settings, added)
    assert_same_corpus(on_cluster, local)
    assert on_cluster.stats["conflicts"] == 1 and on_cluster.stats["added_not_in_export"] == 2
    assert on_cluster.stats["read"]["driver_keys"] == len(local.members) + local.non_members
    # a key labelled both ways in the export stops the build with the local read's message
    (paths["members"] / "part-0.txt").write_bytes((paths["members"] / "part-0.txt").read_bytes() + looked_up + b"\n")
    strict = CorpusSettings(conflicts="error")
    with pytest.raises(BadInput) as local_error:
        load_corpus(paths["members"], paths["lookups"], strict)
    with pytest.raises(BadInput) as cluster_error:
        load_corpus_on_cluster(client, paths["members"], paths["lookups"], strict)
    assert str(cluster_error.value) == str(local_error.value)
    # a bad partition is named by the worker that read it
    (paths["lookups"] / "part-2.parquet").write_bytes(b"not parquet")
    with pytest.raises(BadInput, match="part-2.parquet"):
        load_corpus_on_cluster(client, paths["members"], paths["lookups"], settings)


def pl_first_key(path) -> bytes:
    import polars as pl

    return pl.read_parquet(path)["key"][0].encode()
