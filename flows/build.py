"""The build flow: every stage of the pipeline as a Prefect task, in order.

The stage functions live in `pipeline/` and know nothing of Prefect; this module wires them, times
them, reports progress (`pipeline.progress.StageEvent`) and decides what the store does with the
result. A stage that raises ends the build: BadInput passes through unchanged (the CLI's exit 2),
anything else becomes BuildFailed naming the stage. Either way nothing is published and the
build's staging folder is removed.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from prefect import flow, task
from prefect.cache_policies import NO_CACHE
from prefect.utilities.annotations import quote

from pipeline import corpus as corpus_stage
from pipeline import publish, report, verify
from pipeline.config import BuildConfig, require_paths
from pipeline.drift import Drift, measure_drift
from pipeline.errors import BadInput
from pipeline.features import default_feature_spec, feature_count, featurize
from pipeline.filters import build_filters
from pipeline.model import fit_model
from pipeline.package import package_artifact
from pipeline.progress import Progress, StageEvent, no_progress
from pipeline.provenance import build_provenance
from pipeline.regions import plan_regions, region_of
from pipeline.report_page import REPORT_PAGE_NAME, ScoreSample, write_report_page
from pipeline.trees import score_batch

STAGES = ("corpus", "features", "model", "regions", "filters", "package", "verify", "drift", "report", "publish")

# Reading the corpus is the stage that touches files other systems write, often on a network
# filesystem whose hiccups clear within seconds: three more tries over about 40 s, then give up.
CORPUS_RETRY_DELAYS = (2, 8, 30)

# Features are computed in chunks of this many keys so that their progress can be shown; every
# row is computed on its own, so the matrix is the same as in one call.
FEATURE_CHUNK_KEYS = 1 << 16

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
def read_corpus(config: BuildConfig) -> corpus_stage.Corpus:
    return corpus_stage.load_corpus(config.corpus.members, config.corpus.non_members, config.corpus)


@_stage("features")
def extract_features(corpus: corpus_stage.Corpus, spec: dict, step: Step) -> dict[str, np.ndarray]:
    parts = {"members": corpus.members, "train": corpus.train.keys, "validation": corpus.validation.keys}
    total = sum(len(keys) for keys in parts.values())
    done = 0
    matrices = {}
    for name, keys in parts.items():
        matrix = np.empty((len(keys), feature_count(spec)), dtype=np.float32)
        for start in range(0, len(keys), FEATURE_CHUNK_KEYS):
            chunk = keys[start : start + FEATURE_CHUNK_KEYS]
            matrix[start : start + len(chunk)] = featurize(chunk, spec)
            done += len(chunk)
            step(done, total, "keys", name)
        matrices[name] = matrix
    return matrices


@_stage("model")
def train_model(corpus, X: dict, aim: float, config: BuildConfig, step: Step):
    priced = 0

    def filter_bytes(member_scores, val_scores, val_weights) -> float:
        # fit_model prices every checkpoint of every candidate here: count them as progress
        nonlocal priced
        cost = plan_regions(member_scores, val_scores, val_weights, aim, config.regions).estimated_total_bits / 8
        priced += 1
        step(priced, None, "checkpoints priced", "")
        return cost

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
    return plan, ScoreSample(member_scores, val_scores, corpus.validation.counts)


@_stage("filters")
def fill_filters(corpus, member_scores: np.ndarray, plan, hash_seed: int, step: Step):
    """One region at a time (each holds exactly its members, as in one build_filters call), so the
    progress can be shown in members inserted."""
    regions = region_of(member_scores, plan.boundaries)
    filters, done = [], 0
    for index, fpr in enumerate(plan.fprs):
        picked = np.flatnonzero(regions == index)
        keys = [corpus.members[i] for i in picked]
        filters += build_filters(keys, np.zeros(len(keys), dtype=np.int64), np.array([fpr]), hash_seed)
        done += len(keys)
        step(done, len(corpus.members), "members", f"region {index}")
    return filters


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


@_stage("drift")
def measure_in_service(store: Path, corpus, config: BuildConfig) -> Drift:
    return measure_drift(store, corpus.members, corpus.heldout, corpus.has_counts, config.gate.confidence)


@_stage("report")
def write_reports(staging: Path, summary: dict, scores: ScoreSample) -> None:
    publish.write_report(staging, summary)
    write_report_page(staging, summary, scores)


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
    def stage(self, name: str) -> Iterator[None]:
        self.progress(StageEvent(name, "start"))
        started = time.perf_counter()
        try:
            yield
        except BadInput:
            self.progress(StageEvent(name, "failed", seconds=time.perf_counter() - started))
            raise
        except Exception as error:
            self.progress(StageEvent(name, "failed", seconds=time.perf_counter() - started))
            raise BuildFailed(name, error) from error
        self.timings[name] = round(time.perf_counter() - started, 3)
        self.progress(StageEvent(name, "done", seconds=self.timings[name]))

    def run(self, name: str, stage_task, *args, stepped: bool = False):
        """Run a stage's task; a `stepped` one gets a Step reporter as its last argument."""
        with self.stage(name):
            # quote: Prefect would otherwise walk every key of the corpus looking for futures
            extra = (self.step(name),) if stepped else ()
            return stage_task(*(quote(arg) for arg in (*args, *extra)))


@flow(name="tamis-build", log_prints=False, validate_parameters=False)
def build_flow(config: BuildConfig, progress: Progress | None = None) -> BuildOutcome:
    """Build, verify and (when the gate passes) publish one artifact into the config's store.

    `progress` hears a StageEvent when each stage starts, advances and ends. Raises BadInput for
    input that cannot be used (among it a held-out part too small for the target, found before any
    training) and BuildFailed when a stage fails otherwise.
    """
    stages = _Stages(progress or no_progress)
    require_paths(config)
    store = config.store.path
    publish.check_store(store)  # a store that cannot be used stops the build before any work

    with stages.stage("corpus"):
        corpus = read_corpus(quote(config))
        # rule min_heldout: a corpus that cannot show the target is met stops here, before training
        heldout_size = verify.require_heldout(
            corpus.heldout, corpus.has_counts, config.target.fpr, config.gate, config.corpus.heldout_share
        )
    provenance = build_provenance(config, corpus)
    aim = verify.aim_fpr(config.target.fpr, heldout_size, config.gate.confidence, config.gate.aim_sigmas)
    spec = default_feature_spec()
    X = stages.run("features", extract_features, corpus, spec, stepped=True)
    choice = stages.run("model", train_model, corpus, X, aim, config, stepped=True)
    plan, scores = stages.run("regions", choose_regions, corpus, X, choice.forest, aim, config)
    filters = stages.run("filters", fill_filters, corpus, scores.member_scores, plan, config.filters.hash_seed, stepped=True)

    staging = publish.new_staging(store, provenance["build_id"])
    try:
        artifact = staging / publish.ARTIFACT_NAME
        package_args = (artifact, spec, choice.forest, plan, filters, config.filters.hash_seed, provenance)
        stages.run("package", write_package, *package_args, None)
        checked = stages.run("verify", verify_package, artifact, corpus, config)
        # the measured figures go into the header; sections are unchanged, so what was verified is what ships
        write_package(*package_args, checked.heldout.as_report())

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
            )
            passed = not verify.refusal_reasons(checks)
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
                version=next_version if passed else None,
                timings=stages.timings,
            )
            stages.run("report", write_reports, staging, summary, scores)
            with stages.stage("publish"):
                if passed:
                    version = publish.publish_staging(store, staging, config.store.keep)
                    folder = store / str(version)
                else:
                    version = None
                    folder = publish.refuse_staging(store, staging, provenance["build_id"])
    except BaseException:
        publish.discard_staging(staging)  # nothing to remove once it was published or refused
        raise
    return BuildOutcome(published=passed, version=version, folder=folder, report=summary)
