"""The build flow: every stage of the pipeline as a Prefect task, in order.

The stage functions live in `pipeline/` and know nothing of Prefect; this module wires them, times
them, reports progress (`tamis.progress.StageEvent`) and decides what the store does with the
result. A stage that raises ends the build: BadInput passes through unchanged (the CLI's exit 2),
anything else becomes BuildFailed naming the stage. Either way nothing is published and the
build's staging folder is removed.

Beside the learned artifact the build makes the plain filter it would replace (stage "plain": no
model, one region holding every member, planned at the same aim) and writes both; the gate's rule
model_pays compares their sizes, and gate.when_model_does_not_pay may ship the plain one instead.
Only the artifact that ships is verified.

The stages that touch every key (features, scoring, filter insertion, verification) cut their keys
into chunks of `compute.chunk_keys` and run one task a chunk on the flow's task runner: threads on
this machine, or the workers of a Dask cluster when `compute.cluster` names one (`flow_for`). Chunks
are computed on their own and combined in order (filter bits by OR), so the artifact never depends
on the chunk size or on where the chunks ran.
"""

from __future__ import annotations

import importlib.util
import json
import os
import resource
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, replace
from functools import partial
from pathlib import Path

import numpy as np
from prefect import flow, task
from prefect.cache_policies import NO_CACHE
from prefect.task_runners import ThreadPoolTaskRunner
from prefect.utilities.annotations import quote

from tamis import additions
from tamis import corpus as corpus_stage
from tamis import folding, publish, report, report_page, verify
from tamis.booster import compile_trees
from tamis.config import BuildConfig, require_paths
from tamis.drift import Drift, measure_drift
from tamis.errors import BadInput
from tamis.features import default_feature_spec, featurize
from tamis.filters import RegionFilter, chunk_words, merge_words
from tamis.loader import open_filter
from tamis.model import ModelChoice, fit_model, fit_model_on_cluster
from tamis.package import package_artifact
from tamis.planning import PlanScores, SettledPlan, settle_plan, training_keys
from tamis.probes import CapCost, UnlikeKeys, cap_cost, measure_unlike_keys
from tamis.progress import Progress, StageEvent, no_progress
from tamis.provenance import build_provenance
from tamis.query import default_path, region_of
from tamis.regions import RegionPlan, plan_regions
from tamis.report_page import REPORT_PAGE_NAME, ScoreSample, write_report_page
from tamis.trees import Forest, score_batch

STAGES = ("corpus", "features", "model", "regions", "filters", "plain", "package", "verify", "drift", "report", "publish")

# Reading the corpus is the stage that touches files other systems write, often on a network
# filesystem whose hiccups clear within seconds: three more tries over about 40 s, then give up.
CORPUS_RETRY_DELAYS = (2, 8, 30)

# The plain filter's artifact while the build compares it with the learned one (tamis.verify.PlainComparison);
# one of the two is removed before the staging folder is published or refused.
PLAIN_CANDIDATE_NAME = "plain-candidate.tamis"

# Seconds to wait for a Dask scheduler to answer before calling its address wrong.
CLUSTER_CONNECT_SECONDS = 15

# A stage's report of how far it is: (units done, units in all or None, unit name, note).
Step = Callable[[int, int | None, str, str], None]


class BuildFailed(Exception):
    """A stage raised an error that is not bad input; the build published nothing."""

    def __init__(self, stage: str, error: BaseException):
        self.stage = stage
        self.error = error
        super().__init__(f"stage {stage} failed: {type(error).__name__}: {error}")


@dataclass(frozen=True)
class BuildOutcome:
    published: bool
    version: int | None
    folder: Path
    report: dict
    # the version in service was built from the same inputs: nothing was built or published
    unchanged: bool = False

    @property
    def page(self) -> Path:
        """The build's report page (beside report.json)."""
        return self.folder / REPORT_PAGE_NAME


def retry_on_transient(task, task_run, state) -> bool:
    """Prefect's retry condition: retry an OSError (a read that may work a moment later), never
    BadInput (the input itself is wrong, and a retry would only repeat the message)."""
    error = state.result(raise_on_failure=False)
    return isinstance(error, OSError) and not isinstance(error, BadInput)


def _stage(name: str, **options):
    """A Prefect task for one stage. Inputs are large arrays: no caching, no result persistence."""
    return task(name=name, cache_policy=NO_CACHE, persist_result=False, **options)


@_stage(
    "corpus",
    retries=len(CORPUS_RETRY_DELAYS),
    retry_delay_seconds=list(CORPUS_RETRY_DELAYS),
    retry_condition_fn=retry_on_transient,
)
def read_corpus(config: BuildConfig, added: Sequence[bytes] = ()) -> corpus_stage.Corpus:
    """The corpus, read here or, with compute.cluster, by the cluster's workers partition by
    partition (tamis.cluster_corpus: the same corpus)."""
    paths = (config.corpus.members, config.corpus.non_members, config.corpus, added)
    if not config.compute.cluster:
        return corpus_stage.load_corpus(*paths)
    from distributed import Client  # this task runs in the flow's process, not on a worker

    from tamis.cluster_corpus import load_corpus_on_cluster

    with Client(config.compute.cluster, timeout=CLUSTER_CONNECT_SECONDS) as client:
        return load_corpus_on_cluster(client, *paths)


class Chunk:
    """One chunk of a stage's keys or feature rows (with the members' regions, for insertion).

    Opaque to Prefect on purpose: before a task runs, Prefect looks for futures inside its
    arguments' lists, tuples, dicts and dataclasses, which for a chunk is a walk over every key, but
    not inside other objects. (Prefect's `quote` does the same for a task called in the flow, but
    its wrapper reaches a Dask worker still wrapped.)
    """

    __slots__ = ("items", "regions")

    def __init__(self, items: Sequence, regions: np.ndarray | None = None):
        self.items = items
        self.regions = regions

    def __len__(self) -> int:
        return len(self.items)


def chunks_of(items: Sequence, size: int) -> list[Sequence]:
    """Consecutive slices of at most `size` items; one empty slice when there are none."""
    return [items[start : start + size] for start in range(0, len(items), size)] or [items[:0]]


# A way to run a chunk task over chunks: (task, chunks, shared arguments) -> results in order.
ChunkMap = Callable[..., list]


def run_in_process(chunk_task, chunks: list[Chunk], *shared) -> list:
    """A ChunkMap without Prefect: each chunk through the task's own function, in turn (scripts)."""
    return [chunk_task.fn(chunk, *shared) for chunk in chunks]


def map_parts(run_chunks: ChunkMap, chunk_task, parts: dict[str, Sequence], chunk_size: int, *shared) -> dict[str, np.ndarray]:
    """Run `chunk_task(chunk, *shared)` on every chunk of every part; each part's results joined in order."""
    chunks = {name: [Chunk(piece) for piece in chunks_of(items, chunk_size)] for name, items in parts.items()}
    results = iter(run_chunks(chunk_task, [chunk for name in parts for chunk in chunks[name]], *shared))
    return {name: np.concatenate([next(results) for _ in chunks[name]]) for name in parts}


@_stage("features")
def featurize_chunk(chunk: Chunk, spec: dict) -> np.ndarray:
    return featurize(chunk.items, spec)


@_stage("scoring")
def score_chunk(chunk: Chunk, forest: Forest) -> np.ndarray:
    return score_batch(forest, chunk.items)


@_stage("insertion")
def fill_chunk(chunk: Chunk, filters: list[RegionFilter], hash_seed: int) -> list[np.ndarray]:
    """What one chunk of members gives each region's filter (chunk.regions holds their regions)."""
    return chunk_words(filters, chunk.items, chunk.regions, hash_seed)


@_stage("answers")
def answer_chunk(chunk: Chunk, path: Path, every_path: bool) -> np.ndarray:
    """The answers of the artifact at `path`, opened as a service opens it, for one chunk of keys:
    through every answer path (keys, paths), or through `contains_many` only (keys,)."""
    opened = open_filter(path, answer_path=default_path())  # not yet verified: the path a service here will take
    return verify.every_path_answers(opened, chunk.items) if every_path else opened.contains_many(chunk.items)


@_stage("held-out regions")
def region_chunk(chunk: Chunk, path: Path) -> np.ndarray:
    """The region of each key of one chunk in the artifact at `path`: its features scored by the
    artifact's own forest (for the report's per-region rates; no choice depends on them)."""
    opened = open_filter(path)
    return region_of(score_batch(opened.forest, featurize(chunk.items, opened.feature_spec)), np.asarray(opened.boundaries))


def extract_features(run_chunks: ChunkMap, corpus: corpus_stage.Corpus, train: corpus_stage.KeySet, spec: dict, config: BuildConfig) -> dict[str, np.ndarray]:
    """Feature matrices of all members, the light training sample, the validation and check keys
    and the heavy keys."""
    parts = {
        "members": corpus.members,
        "train": train.keys,
        "validation": corpus.validation.keys,
        "check": corpus.check.keys,
        "heavy": corpus.heavy.keys,
    }
    return map_parts(run_chunks, featurize_chunk, parts, config.compute.chunk_keys, spec)


@_stage("model")
def train_model(corpus, train: corpus_stage.KeySet, X: dict, aim: float, config: BuildConfig, step: Step):
    priced = 0

    def filter_bytes(member_scores, val_scores, val_weights) -> float:
        # fit_model prices every checkpoint of every candidate here: count them as progress
        nonlocal priced
        cost = plan_regions(member_scores, val_scores, val_weights, aim, config.regions, refine=False).estimated_total_bits / 8
        priced += 1
        step(priced, None, "checkpoints priced", "")
        return cost

    inputs = (
        X["members"],
        np.vstack([X["train"], X["heavy"]]),
        np.concatenate([train.counts, corpus.heavy.counts]).astype(np.float64),
        np.vstack([X["validation"], X["heavy"]]),
        corpus_stage.plan_weights(corpus),
        filter_bytes,
        config.model,
    )
    if not config.compute.cluster:
        return fit_model(*inputs)
    from distributed import Client  # this task runs in the flow's process, not on a worker

    with Client(config.compute.cluster, timeout=CLUSTER_CONNECT_SECONDS) as client:
        return fit_model_on_cluster(client, *inputs)


def score_plan_keys(run_chunks: ChunkMap, corpus, X: dict, forest: Forest, config: BuildConfig) -> PlanScores:
    """The model's scores of the members and of the validation, check and heavy keys, chunk by chunk."""
    parts = {"members": X["members"], "validation": X["validation"], "check": X["check"], "heavy": X["heavy"]}
    scores = map_parts(run_chunks, score_chunk, parts, config.compute.chunk_keys, forest)
    return PlanScores(scores["members"], scores["validation"], scores["check"], scores["heavy"], corpus_stage.plan_weights(corpus))


def fill_filters(run_chunks: ChunkMap, corpus, member_scores: np.ndarray, config: BuildConfig, plan,
                 empty: list[RegionFilter]) -> list[RegionFilter]:
    """One filter per region holding exactly its members: the parts of each chunk of members merged
    into `empty` (the plan's filters, holding no member yet): Bloom bits ORed, fuse filters solved
    from all their members' hashes."""
    regions = region_of(member_scores, plan.boundaries)
    filters = empty
    size = config.compute.chunk_keys
    chunks = [Chunk(keys, part) for keys, part in zip(chunks_of(corpus.members, size), chunks_of(regions, size))]
    words = run_chunks(fill_chunk, chunks, filters, config.filters.hash_seed)
    return merge_words(filters, words, config.filters.hash_seed)


@dataclass(frozen=True)
class Candidate:
    """An artifact the build can publish: its model, its settled plan (filters built) and the scores
    the plan was made from."""

    choice: ModelChoice
    settled: SettledPlan
    scores: ScoreSample

    @property
    def plan(self) -> RegionPlan:
        return self.settled.plan

    @property
    def filters(self) -> list[RegionFilter]:
        return self.settled.filters


def settle(run_chunks: ChunkMap, corpus, scores: PlanScores, aim: float, config: BuildConfig) -> SettledPlan:
    """`tamis.planning.settle_plan` with each round's filters filled chunk by chunk."""
    return settle_plan(scores, corpus, aim, config, partial(fill_filters, run_chunks, corpus, scores.members, config))


def plain_candidate(run_chunks: ChunkMap, corpus, learned: Candidate, aim: float, config: BuildConfig) -> Candidate:
    """The plain filter the learned artifact would replace: a forest of no trees (every key gets the
    same score) and so one region holding every member, planned and settled at the same aim, so
    that it would be certified the same way. The region plan and the filter stage choose its filter
    as they would for any region, and the same loader answers it."""
    forest = compile_trees([], learned.choice.forest.features)

    def same(count: int) -> np.ndarray:
        return np.full(count, forest.bias, dtype=np.int64)

    scores = PlanScores(same(len(corpus.members)), same(len(corpus.validation.keys)), same(len(corpus.check.keys)),
                        same(len(corpus.heavy.keys)), corpus_stage.plan_weights(corpus))
    settled = settle(run_chunks, corpus, scores, aim, config)
    filters = settled.filters
    choice = replace(learned.choice, forest=forest, trees=0, auc=0.5, model_bytes=forest.nbytes,
                     filter_bytes=sum(f.nbytes for f in filters), total_bytes=forest.nbytes + sum(f.nbytes for f in filters))
    return Candidate(choice, settled, ScoreSample(scores.members, scores.validation, corpus.validation.counts))


def write_candidate(path: Path, spec: dict, candidate: Candidate, config: BuildConfig, provenance: dict) -> int:
    """Write a candidate's artifact (no measured figures yet) and return its size in bytes."""
    package_artifact(path, feature_spec=spec, forest=candidate.choice.forest, boundaries=candidate.plan.boundaries,
                     region_filters=candidate.filters, hash_seed=config.filters.hash_seed, provenance=provenance)
    return path.stat().st_size


@_stage("package")
def write_package(path: Path, spec: dict, forest, plan, filters, hash_seed: int, provenance: dict, measured: dict | None,
                  verified_paths: tuple[str, ...]) -> None:
    package_artifact(
        path,
        feature_spec=spec,
        forest=forest,
        boundaries=plan.boundaries,
        region_filters=filters,
        hash_seed=hash_seed,
        provenance=provenance,
        measured=measured,
        verified_paths=verified_paths,
    )


def verify_package(run_chunks: ChunkMap, path: Path, corpus, config: BuildConfig) -> verify.Verification:
    """Every member and a sample of held-out keys through every answer path of the written
    artifact, and every heavy and held-out key through the service's path, chunk by chunk."""
    every_path = {"members": corpus.members, "sample": verify.path_sample(corpus.heldout.keys)}
    answers = map_parts(run_chunks, answer_chunk, every_path, config.compute.chunk_keys, path, True)
    parts = {"heavy": corpus.heavy.keys, "heldout": corpus.heldout.keys}
    served = map_parts(run_chunks, answer_chunk, parts, config.compute.chunk_keys, path, False)
    regions = map_parts(run_chunks, region_chunk, {"heldout": corpus.heldout.keys}, config.compute.chunk_keys, path)["heldout"]
    return verify.verification(answers["members"], answers["sample"], served["heavy"], served["heldout"],
                               verify.strata_of(corpus), config.gate.confidence, regions, len(open_filter(path).boundaries) + 1)


def probe_unlike(path: Path, corpus, config: BuildConfig) -> UnlikeKeys:
    """Families of keys unlike the sample asked of the written artifact (`tamis.probes`)."""
    return measure_unlike_keys(open_filter(path).contains_many, corpus.members, config.corpus.split_seed)


def price_cap(scores: PlanScores, settled: SettledPlan, config: BuildConfig) -> CapCost:
    """What a cap on every region's rate would cost the settled plan (`tamis.probes.cap_cost`)."""
    rate = settled.rounds[settled.chosen].rate
    return cap_cost(scores.members, scores.nonmembers, scores.weights, rate, config.regions, config.target.fpr)


@_stage("drift")
def measure_in_service(store: Path, corpus, config: BuildConfig) -> Drift:
    return measure_drift(store, corpus, config.gate.confidence)


@_stage("report")
def write_reports(staging: Path, summary: dict, scores: ScoreSample) -> dict[str, str]:
    """report.json and the report page; returns the page's figures, so that the page can be
    written again with the last timings without drawing them again."""
    figures = report_page.draw_figures(summary, scores)
    publish.write_report(staging, summary)
    write_report_page(staging, summary, figures)
    return figures


def finish_reports(folder: Path, summary: dict, figures: dict[str, str]) -> None:
    """Rewrite both reports in their final folder, now that the artifact's path and the timings of
    the report and publish stages are known (each file is replaced whole, so a crash leaves the
    first version of it)."""
    publish.write_report(folder, summary)
    write_report_page(folder, summary, figures)


def check_inputs(config: BuildConfig) -> None:
    """The checks that need no reading of keys: the paths are given, both sources open and fit in
    memory, the store can be written. Cheap, so the CLI runs them before Prefect starts, and a bad
    path fails in seconds (the flow makes the same checks as it starts)."""
    require_paths(config)
    corpus_stage.check_sources(config.corpus.members, config.corpus.non_members)
    publish.check_store(config.store.path)


class _Stages:
    """Runs stages in order: sends their progress events, keeps their timings, names a failure."""

    def __init__(self, progress: Progress):
        self.progress = progress
        self.timings: dict[str, float] = {}

    def step(self, stage: str) -> Step:
        def report(done: int, total: int | None, unit: str, note: str) -> None:
            self.progress(StageEvent(stage, "step", done=done, total=total, unit=unit, note=note))

        return report

    @contextmanager
    def stage(self, name: str) -> Iterator[dict]:
        """Runs the body as stage `name`; the body may set the yielded dict's "note" to say how the
        stage ended when "done" would mislead (a refused build's publish stage publishes nothing)."""
        self.progress(StageEvent(name, "start"))
        started = time.perf_counter()
        ending = {"note": ""}
        try:
            yield ending
        except BadInput:
            self.progress(StageEvent(name, "failed", seconds=time.perf_counter() - started))
            raise
        except Exception as error:
            self.progress(StageEvent(name, "failed", seconds=time.perf_counter() - started))
            raise BuildFailed(name, error) from error
        self.timings[name] = round(time.perf_counter() - started, 3)
        self.progress(StageEvent(name, "done", seconds=self.timings[name], note=ending["note"]))

    def chunks(self, name: str) -> ChunkMap:
        """A ChunkMap for stage `name`: one task run a chunk on the flow's task runner, all submitted
        at once, results taken in order; the stage's progress counts the keys of the chunks done."""
        step = self.step(name)

        def run_chunks(chunk_task, chunks: list[Chunk], *shared) -> list:
            futures = [chunk_task.submit(chunk, *shared) for chunk in chunks]
            total = sum(map(len, chunks))
            results, done = [], 0
            for future, chunk in zip(futures, chunks):
                results.append(future.result())
                done += len(chunk)
                step(done, total, "keys", chunk_task.name)
            return results

        return run_chunks

    def run(self, name: str, stage_task, *args, stepped: bool = False):
        """Run a stage's task; a `stepped` one gets a Step reporter as its last argument."""
        with self.stage(name):
            # quote: Prefect would otherwise walk every key of the corpus looking for futures
            extra = (self.step(name),) if stepped else ()
            return stage_task(*(quote(arg) for arg in (*args, *extra)))


# Chunk tasks on this machine: one thread a core (numpy releases the GIL in the heavy loops).
LOCAL_TASK_RUNNER = ThreadPoolTaskRunner(max_workers=os.cpu_count() or 1)


@flow(name="tamis-build", log_prints=False, validate_parameters=False, task_runner=LOCAL_TASK_RUNNER)
def build_flow(config: BuildConfig, progress: Progress | None = None, replace_newer: bool = False) -> BuildOutcome:
    """Build, verify and (when the gate passes) publish one artifact into the config's store.

    `progress` hears a StageEvent when each stage starts, advances and ends. Raises BadInput for
    input that cannot be used (among it a held-out part too small for the target, found before any
    training) and BuildFailed when a stage fails otherwise. The store's pending additions are
    folded in (`tamis.folding`); a version in service built from the same inputs ends the build
    at once (`unchanged`), and one built from a later members export is not replaced unless
    `replace_newer`.
    """
    started = time.perf_counter()
    stages = _Stages(progress or no_progress)
    require_paths(config)
    store = config.store.path
    publish.check_store(store)  # a store that cannot be used stops the build before any work; the
    # sources are checked first thing in the corpus stage (load_corpus)

    with stages.stage("corpus"):
        newest_at_start = folding.newest_version(store)
        pending = folding.read_pending(store)
        corpus = read_corpus(quote(config), quote(pending.keys))
        # rule min_heldout: a corpus that cannot show the target is met stops here, before training
        strata = verify.strata_of(corpus)
        verify.require_heldout(strata, config.target.fpr, config.gate, config.corpus.heldout_share)
    provenance = {**build_provenance(config, corpus), "additions_through": pending.through}
    unchanged = folding.unchanged_version(store, provenance)
    if unchanged is not None:
        folder = store / str(unchanged)
        return BuildOutcome(False, unchanged, folder, json.loads((folder / publish.REPORT_NAME).read_text()), unchanged=True)
    inputs = folding.inputs_fields(config.corpus.members)
    aim = verify.aim_fpr(config.target.fpr, strata, corpus.check.counts, config.gate.confidence, config.gate.aim_sigmas,
                         config.filters.variants)
    spec = default_feature_spec()
    train = training_keys(corpus, config)
    with stages.stage("features"):
        X = extract_features(stages.chunks("features"), corpus, train, spec, config)
    choice = stages.run("model", train_model, corpus, train, X, aim, config, stepped=True)
    with stages.stage("regions"):
        plan_scores = score_plan_keys(stages.chunks("regions"), corpus, X, choice.forest, config)
    with stages.stage("filters"):
        settled = settle(stages.chunks("filters"), corpus, plan_scores, aim, config)
        capped = price_cap(plan_scores, settled, config)
    scores = ScoreSample(plan_scores.members, plan_scores.nonmembers, plan_scores.weights)
    learned = Candidate(choice, settled, scores)
    with stages.stage("plain"):
        plain = plain_candidate(stages.chunks("plain"), corpus, learned, aim, config)

    staging = publish.new_staging(store, provenance["build_id"])
    try:
        artifact = staging / publish.ARTIFACT_NAME
        with stages.stage("package"):
            # both candidates are written as they would ship, and the smaller compared before either is verified
            comparison = verify.PlainComparison(
                learned_bytes=write_candidate(artifact, spec, learned, config, provenance),
                plain_bytes=write_candidate(staging / PLAIN_CANDIDATE_NAME, spec, plain, config, provenance),
            )
            chosen = plain if verify.publishes_plain(comparison, config.gate.when_model_does_not_pay) else learned
            if chosen is plain:
                os.replace(staging / PLAIN_CANDIDATE_NAME, artifact)
            else:
                os.unlink(staging / PLAIN_CANDIDATE_NAME)
        choice, plan, filters, scores = chosen.choice, chosen.plan, chosen.filters, chosen.scores
        package_args = (artifact, spec, choice.forest, plan, filters, config.filters.hash_seed, provenance)
        with stages.stage("verify"):
            checked = verify_package(stages.chunks("verify"), artifact, corpus, config)
            unlike = probe_unlike(artifact, corpus, config)
        # the measured figures and the paths verified go into the header; sections are unchanged, so what was verified is what ships
        write_package(*package_args, {**checked.heldout.as_report(), "target_fpr": config.target.fpr}, checked.paths.query_paths)
        additions.write_members(staging, corpus.members)  # what a rollback to this version reads

        with publish.store_lock(store):
            # under the lock: the version measured is the one a publish would replace
            drift = stages.run("drift", measure_in_service, store, corpus, config)
            total_bytes = artifact.stat().st_size
            checks = verify.gate_checks(
                checked,
                target=config.target.fpr,
                total_bytes=total_bytes,
                members=len(corpus.members),
                settings=config.gate,
                baseline=drift.baseline(),
                comparison=comparison,
                plan=verify.PlanFigures(aim, chosen.settled.estimate, chosen.settled.allowed),
                unlike=unlike.worst,
            )
            older = None if replace_newer else folding.newer_inputs_reason(store, inputs, newest_at_start)
            passed = not verify.refusal_reasons(checks) and older is None
            next_version = publish.next_version(store)
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
                checks=checks,
                drift=drift,
                comparison=comparison,
                published_plain=chosen is plain,
                settled=chosen.settled,
                plain_settled=plain.settled,
                version=next_version if passed else None,
                timings=stages.timings,
            )
            summary["additions"] = folding.report_fields(pending, corpus.stats["added_not_in_export"])
            summary["inputs"] = inputs
            summary["unlike_keys"] = {**unlike.as_report(), "certified_upper": checked.heldout.fpr_upper,
                                      "cap": capped.as_report()}
            if older is not None:
                summary["gate"] = {**summary["gate"], "passed": False, "reasons": [*summary["gate"]["reasons"], older]}
            figures = stages.run("report", write_reports, staging, summary, scores)
            with stages.stage("publish") as ending:
                if passed:
                    version = publish.publish_staging(store, staging, config.store.keep)
                    folder = store / str(version)
                    summary["additions"]["retired_through"] = folding.retire(store)
                else:
                    version = None
                    folder = publish.refuse_staging(store, staging, provenance["build_id"])
                    ending["note"] = "refused: nothing published, the version in service stays"
            summary["paths"]["artifact"] = str(folder / publish.ARTIFACT_NAME)
            summary["timings"] = {**stages.timings, "total": round(time.perf_counter() - started, 3)}
            # the most this process (the driver, on a cluster) held at once (ru_maxrss is in KiB on Linux)
            summary["memory"] = {"peak_rss_bytes": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024}
            finish_reports(folder, summary, figures)
    except BaseException:
        publish.discard_staging(staging)  # nothing to remove once it was published or refused
        raise
    return BuildOutcome(published=passed, version=version, folder=folder, report=summary)


def flow_for(config: BuildConfig):
    """The build flow on the task runner the config asks for: the workers of the Dask cluster whose
    scheduler compute.cluster names (through prefect-dask), else threads on this machine. A cluster
    that cannot be used is bad input, found before any work."""
    if not config.compute.cluster:
        return build_flow
    check_cluster(config.compute.cluster)
    from prefect_dask import DaskTaskRunner

    return build_flow.with_options(task_runner=DaskTaskRunner(address=config.compute.cluster))


def check_cluster(address: str) -> None:
    """Raise BadInput unless the cluster packages are installed and the scheduler answers."""
    if not all(importlib.util.find_spec(package) for package in ("distributed", "prefect_dask")):
        raise BadInput(f"compute.cluster = {address!r} needs Dask: install the cluster extra (pip install 'tamis[cluster]')")
    from distributed import Client

    try:
        with Client(address, timeout=CLUSTER_CONNECT_SECONDS) as client:
            workers = len(client.scheduler_info()["workers"])
    except (OSError, TimeoutError, ValueError) as exc:
        raise BadInput(
            f"cannot reach the Dask scheduler at {address!r} ({type(exc).__name__}: {exc}); check compute.cluster "
            f"(--cluster), e.g. tcp://10.0.0.5:8786, and that the scheduler is running"
        ) from None
    if workers == 0:
        raise BadInput(f"the Dask scheduler at {address!r} has no workers; start some (dask worker {address})")
