"""The build flow: every stage of the pipeline as a Prefect task, in order.

The stage functions live in `pipeline/` and know nothing of Prefect; this module wires them, times
them, reports progress and decides what the store does with the result.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from prefect import flow, task
from prefect.cache_policies import NO_CACHE
from prefect.utilities.annotations import quote

from pipeline import corpus as corpus_stage
from pipeline import publish, report, verify
from pipeline.config import BuildConfig, require_paths
from pipeline.features import default_feature_spec, featurize
from pipeline.filters import build_filters
from pipeline.model import fit_model
from pipeline.package import package_artifact
from pipeline.provenance import build_provenance
from pipeline.regions import plan_regions, region_of
from pipeline.trees import score_batch

STAGES = ("corpus", "features", "model", "regions", "filters", "package", "verify", "publish")

Progress = Callable[[str, str, float], None]


@dataclass(frozen=True)
class BuildOutcome:
    published: bool
    version: int | None
    folder: Path
    report: dict


def _stage(name: str, retries: int = 0):
    """A Prefect task for one stage. Inputs are large arrays: no caching, no result persistence."""
    return task(name=name, cache_policy=NO_CACHE, persist_result=False, retries=retries, retry_delay_seconds=2)


@_stage("corpus", retries=0)
def read_corpus(config: BuildConfig) -> corpus_stage.Corpus:
    return corpus_stage.load_corpus(config.corpus.members, config.corpus.non_members, config.corpus)


@_stage("features")
def extract_features(corpus: corpus_stage.Corpus, spec: dict) -> dict[str, np.ndarray]:
    return {
        "members": featurize(corpus.members, spec),
        "train": featurize(corpus.train.keys, spec),
        "validation": featurize(corpus.validation.keys, spec),
    }


@_stage("model")
def train_model(corpus, X: dict, aim: float, config: BuildConfig):
    def filter_bytes(member_scores, val_scores, val_weights) -> float:
        return plan_regions(member_scores, val_scores, val_weights, aim, config.regions).estimated_total_bits / 8

    return fit_model(
        X["members"],
        X["train"],
        corpus.train.counts.astype(np.float64),
        X["validation"],
        corpus.validation.counts.astype(np.float64),
        filter_bytes,
        config.model,
    )


@_stage("regions")
def choose_regions(corpus, X: dict, forest, aim: float, config: BuildConfig):
    member_scores = score_batch(forest, X["members"])
    val_scores = score_batch(forest, X["validation"])
    plan = plan_regions(member_scores, val_scores, corpus.validation.counts, aim, config.regions)
    return plan, member_scores


@_stage("filters")
def fill_filters(corpus, member_scores: np.ndarray, plan, hash_seed: int):
    return build_filters(corpus.members, region_of(member_scores, plan.boundaries), plan.fprs, hash_seed)


@_stage("package")
def write_package(path: Path, spec: dict, forest, plan, filters, hash_seed: int, provenance: dict, measured: dict | None) -> None:
    package_artifact(
        path,
        feature_spec=spec,
        forest=forest,
        boundaries=plan.boundaries,
        region_filters=filters,
        hash_seed=hash_seed,
        provenance=provenance,
        measured=measured,
    )


@_stage("verify")
def verify_package(path: Path, corpus, config: BuildConfig) -> verify.Verification:
    return verify.verify_artifact(path, corpus.members, corpus.heldout, corpus.has_counts, config.gate.confidence)


@flow(name="tamis-build", log_prints=False, validate_parameters=False)
def build_flow(config: BuildConfig, progress: Progress | None = None) -> BuildOutcome:
    """Build, verify and (when the gate passes) publish one artifact into the config's store.

    `progress(stage, event, seconds)` hears "start" and "done" of every stage.
    """
    progress = progress or (lambda stage, event, seconds: None)
    require_paths(config)
    store = config.store.path
    timings: dict[str, float] = {}

    def run(stage: str, fn, *args):
        progress(stage, "start", 0.0)
        started = time.perf_counter()
        # quote: Prefect would otherwise walk every key of the corpus looking for futures
        result = fn(*(quote(arg) for arg in args))
        timings[stage] = round(time.perf_counter() - started, 3)
        progress(stage, "done", timings[stage])
        return result

    corpus = run("corpus", read_corpus, config)
    provenance = build_provenance(config, corpus)
    heldout_sample = verify.effective_sample_size(corpus.heldout.counts) if corpus.has_counts else len(corpus.heldout.keys)
    aim = verify.aim_fpr(config.target.fpr, heldout_sample, config.gate.confidence, config.gate.aim_sigmas)
    spec = default_feature_spec()
    X = run("features", extract_features, corpus, spec)
    choice = run("model", train_model, corpus, X, aim, config)
    plan, member_scores = run("regions", choose_regions, corpus, X, choice.forest, aim, config)
    filters = run("filters", fill_filters, corpus, member_scores, plan, config.filters.hash_seed)

    staging = publish.new_staging(store, provenance["build_id"])
    artifact = staging / publish.ARTIFACT_NAME
    package_args = (artifact, spec, choice.forest, plan, filters, config.filters.hash_seed, provenance)
    run("package", write_package, *package_args, None)
    checked = run("verify", verify_package, artifact, corpus, config)
    # the measured figures go into the header; sections are unchanged, so what was verified is what ships
    write_package(*package_args, checked.heldout.as_report())

    with publish.store_lock(store):
        started = time.perf_counter()
        progress("publish", "start", 0.0)
        total_bytes = artifact.stat().st_size
        reasons = verify.gate_reasons(checked, config.target.fpr, config.gate.fpr_slack, total_bytes, config.gate.max_artifact_bytes)
        versions = publish.published_versions(store)
        next_version = (versions[-1] if versions else 0) + 1
        summary = report.build_report(
            config=config,
            corpus=corpus,
            provenance=provenance,
            aim_fpr=aim,
            choice=choice,
            plan=plan,
            filters=filters,
            verification=checked,
            total_bytes=total_bytes,
            reasons=reasons,
            version=next_version if not reasons else None,
            timings=timings,
        )
        publish.write_report(staging, summary)
        if reasons:
            folder = publish.refuse_staging(store, staging, provenance["build_id"])
            version = None
        else:
            version = publish.publish_staging(store, staging, config.store.keep)
            folder = store / str(version)
        timings["publish"] = round(time.perf_counter() - started, 3)
        progress("publish", "done", timings["publish"])
    return BuildOutcome(published=not reasons, version=version, folder=folder, report=summary)
