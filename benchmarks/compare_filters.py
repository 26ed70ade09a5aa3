"""Compare a plain Bloom filter, a one-threshold learned filter and the full artifact, byte for byte.

Run: .venv/bin/python benchmarks/compare_filters.py [--quick] [--targets 0.001,0.01,0.05]
         [--corpus demo,words,words-by-key,hex] [--demo-members 200000] [--demo-non-members 2000000]
         [--max-region-fpr 0.1]

Corpora. `demo` is the Emberfall demo (`tamis.demo.write_demo_corpus`, by default the full
200,000 members and 2,000,000 looked-up handles). `words` is the open word corpus of
`benchmarks/word_corpus.py`: English words against the words of eight other languages, with their
occurrence counts as lookup counts (needs the `bench` extra).
Those counts have a very heavy head (one word carries 2.7% of all lookups): the words looked up at
least tau times are a take-all stratum, answered exactly, and only the light tail is sampled, so
every target builds (`tamis.verify`). `words-by-key` is the same keys without the
counts, every distinct word one lookup: about 460,000 held-out words, plenty for 0.1%. `hex` is keys
with no structure: 200,000 member and 1,000,000 non-member random 128-bit digests as hex, no
counts, so the model can learn nothing and the artifact is a plain filter with a header. Every
corpus uses the demo's build config (`configs/demo.toml`) apart from the target (and the region
cap, --max-region-fpr).

Each corpus goes through the pipeline's own stage functions in this process (the bodies of the
build flow's tasks in `tamis.flows.build`): the corpus stage with its hash split, and the features stage
once per corpus, its matrices shared by every target. Then, per target F:

(a) plain Bloom: one Bloom filter of all members at F (`tamis.bloom`); its bytes are its bit array.
    Beside it, table 2 gives the best plain static filter at F* (`tamis.baselines.best_static_filter`:
    the smaller of that Bloom filter and a binary fuse filter with 2^-r <= F*), the baseline a
    demanding user would pick without a model.
(b) one threshold: the chosen model with one score threshold; members below it go into one backup
    Bloom filter, keys at or above it answer yes (`tamis.baselines.plan_single_threshold`); the
    threshold and the split of F between the two parts are chosen on the validation non-members,
    and it is packaged as an artifact with the same compiled model, so it pays the same model bytes.
(c) full: the artifact as the build flow makes it: aim below F (`tamis.verify.aim_fpr`), the
    model chosen by bytes at the aim, regions, filters, package.

All are measured as verify measures them: heavy keys exactly and the held-out light keys (never
used for training or any choice) for the tail, by lookups when the corpus has counts, and by
distinct held-out keys; (b) and (c) through the loader on the written file,
as the verify stage does (with every member checked). Bytes of (b) and (c) are artifact file sizes.

Equal measured FPR. The pipeline plans for an aim below the target, the margin that lets a build on
target pass its confidence gate, so at one target the full artifact holds a lower false-positive rate
than a Bloom filter built at F, and comparing their bytes would charge it for its safety margin
(log2(F / aim) / ln 2 bits for every member in a backup filter). The headline ratios (table 2)
therefore compare at F*, the full artifact's measured held-out rate:
- plain Bloom at F*: the bytes the sizing formula gives at F* (bits rounded up to 64-bit words, as
  built). A Bloom filter's rate comes from its hashing alone, not from the keys; row (a) of table 1
  shows its measured rate at F agrees with the formula;
- one threshold at F*: its rate depends on the keys (the share of lookups above its threshold is an
  estimate too), so it is built at 17 planned rates from F*/4 to 4 F* and the smallest whose
  measured rate is at most F* is taken. Choosing on the held-out keys can only flatter this baseline;
- ideal at F*: n (log2(1/F*) - D) / ln 2 / 8 + model bytes with D the divergence of the full
  artifact's regions (`tamis.baselines.ideal_bytes`), and beside it the reachable version, the
  same regions with their budgets capped at 1 (`clamped_ideal_bytes`): the formula credits a region
  whose budget would exceed 1 with savings no filter can make.
Table 1 prints the raw figures at the target, table 3 what explains the sizes (the model's AUC and
bytes, the regions' divergence against the most the segments allow, the number of regions and of
budgets at 1, and full - ideal@F* split into container bytes, Bloom rounding, clamping, and the gap
between the aim the filters were sized for and the rate measured). Table 4 lists every backup filter
of the full artifact, its kind (Bloom or binary fuse), probes or arity, fingerprint width, budget,
bits and the bound n_i log2(1/f_i) at its budget, with their ratio (the factor) per region and in all.

Goals (table 2): on the demo at 1%, full <= 0.34 x plain Bloom, <= 0.85 x one threshold and <= 1.10 x
ideal, all at F*; on the word corpora, full below plain Bloom and below the best plain static filter
at every target; on hex keys, full <= 0.90 x plain Bloom at F*. Table 4: on the demo at 1%, backup
bits <= 1.25 x the bound.
"""

from __future__ import annotations

import argparse
import dataclasses
import functools
import math
import sys
import tempfile
import time
from collections.abc import Sequence
from dataclasses import dataclass
from importlib import resources
from pathlib import Path

import numpy as np
import polars as pl

from tamis.flows.build import (
    extract_features,
    fill_filters,
    read_corpus,
    run_in_process,
    score_plan_keys,
    settle,
    train_model,
    verify_package,
    write_package,
)
from tamis.planning import spare_filters, training_keys
from tamis.report_page import ScoreSample
from tamis import verify
from tamis.baselines import StaticFilter, best_static_filter, clamped_ideal_bytes, ideal_bytes, plan_single_threshold
from tamis.bloom import BloomFilter, KeyHashes, hash_keys, word_count
from tamis.sizing import bloom_bits, bloom_hashes, lower_bound_bits
from tamis.config import BuildConfig, load_config, with_overrides
from tamis.corpus import Corpus, KeySet
from tamis.demo import write_demo_corpus
from tamis.errors import BadInput
from tamis.features import default_feature_spec, featurize
from tamis.query import region_of
from tamis.regions import kl_divergence_bits, segment_edges, segment_shares
from tamis.trees import score_batch

import word_corpus  # benchmarks/word_corpus.py: this script's folder is on sys.path when it runs

CORPORA = ("demo", "words", "words-by-key", "hex")
# The corpus of keys with no structure: random 128-bit digests as 32 hex digits, no counts.
HEX_SIZE = (200_000, 1_000_000)
HEX_SEED = 20261202
DEFAULT_TARGETS = (0.001, 0.01, 0.05)
# every corpus is built with the demo's config (as `tamis demo` does), only the target changes
DEMO_CONFIG = resources.files("tamis.configs") / "demo.toml"
# --quick: a demo of this size trains in seconds; the word corpora keep their size (they are what
# they are) but train the small model grid below.
QUICK_DEMO = (20_000, 200_000)
QUICK_MODEL = {"leaves": (15,), "learning_rates": (0.5,), "max_trees": 20}
# The goals of the comparison, at equal measured FPR (see the docstring).
GOAL_TARGET = 0.01
GOAL_VS_BLOOM = 0.34
# Keys with no structure: the artifact is a plain fingerprint filter with a header.
GOAL_HEX_VS_BLOOM = 0.90
# Backup filter bits against sum_i n_i log2(1/f_i) at the regions' budgets (table 4), on the demo at 1%.
GOAL_BACKUP_VS_BOUND = 1.25
GOAL_VS_ONE_THRESHOLD = 0.85
GOAL_VS_IDEAL = 1.10
# (b) at equal measured FPR is searched among plans at F* x 2^(j/4), j in this range: F*/4 to 4 F*.
ONE_THRESHOLD_STEPS = range(-8, 9)


def log(message: str) -> None:
    print(f"[{time.strftime('%H:%M:%S')}] {message}", file=sys.stderr, flush=True)


def quiet(done: int, total: int | None, unit: str, note: str) -> None:
    """A stage's progress reporter that says nothing (the stages report per chunk or checkpoint)."""


# Corpora -----------------------------------------------------------------------------------------


def write_corpus(name: str, folder: Path, demo_size: tuple[int, int]) -> tuple[Path, Path]:
    """The members and non-members files of a corpus, written into `folder`."""
    if name == "demo":
        return write_demo_corpus(folder, members=demo_size[0], non_members=demo_size[1])
    if name == "hex":
        return write_hex_corpus(folder)
    members, nonmembers = word_corpus.write_word_corpus(folder)
    if name == "words-by-key":
        keys_only = folder / "foreign_word_keys.parquet"
        pl.read_parquet(nonmembers).select("key").write_parquet(keys_only)
        return members, keys_only
    return members, nonmembers


def write_hex_corpus(folder: Path) -> tuple[Path, Path]:
    """Members and non-members that are random 32-digit hex digests (distinct, seeded): nothing for
    a model to learn, so the artifact can only be a plain filter with a header."""
    folder.mkdir(parents=True, exist_ok=True)
    members, non_members = HEX_SIZE
    digests = np.random.default_rng(HEX_SEED).bytes(16 * (members + non_members))
    keys = [digests[16 * i : 16 * i + 16].hex() for i in range(members + non_members)]
    paths = folder / "hex_members.parquet", folder / "hex_non_members.parquet"
    pl.DataFrame({"key": keys[:members]}).write_parquet(paths[0])
    pl.DataFrame({"key": keys[members:]}).write_parquet(paths[1])
    return paths


@dataclass(frozen=True)
class Prepared:
    """A corpus read and split, with what every target shares: the training sample and the feature
    matrices of the build flow's features stage, the held-out keys' features and their hashes (one
    seed for all filters)."""

    name: str
    corpus: Corpus
    config: BuildConfig
    spec: dict
    train: KeySet
    features: dict
    probe_features: np.ndarray
    probe_hashes: KeyHashes

    @property
    def heavy(self) -> int:
        """The probe keys are the heavy keys, then the held-out light keys."""
        return len(self.corpus.heavy.keys)


def prepare(name: str, folder: Path, demo_size: tuple[int, int], model: dict, regions: dict) -> Prepared:
    members, nonmembers = write_corpus(name, folder, demo_size)
    overrides = {"corpus": {"members": members, "non_members": nonmembers}, "model": model, "regions": regions}
    config = with_overrides(load_config(Path(str(DEMO_CONFIG))), **overrides)
    corpus = read_corpus.fn(config)
    spec = default_feature_spec()
    started = time.perf_counter()
    train = training_keys(corpus, config)
    features = extract_features(run_in_process, corpus, train, spec, config)
    probes = corpus.heavy.keys + corpus.heldout.keys
    probe_features = featurize(probes, spec)
    probe_hashes = hash_keys(probes, config.filters.hash_seed)
    log(
        f"{name}: {len(corpus.members):,} members, {len(corpus.heavy.keys):,} heavy (tau {corpus.tau}) and "
        f"{len(corpus.train.keys):,} / {len(corpus.validation.keys):,} / {len(corpus.heldout.keys):,} train / validation / "
        f"held-out light non-members; features in {time.perf_counter() - started:.0f} s"
    )
    return Prepared(name, corpus, config, spec, train, features, probe_features, probe_hashes)


# Filters -----------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Measured:
    """One filter's bytes and its held-out false-positive rates."""

    label: str
    bytes: int
    by_lookups: float | None
    by_keys: float

    @property
    def rate(self) -> float:
        """The rate the pipeline judges: by lookups when the corpus has counts, else by keys."""
        return self.by_keys if self.by_lookups is None else self.by_lookups


def measured(label: str, size: int, answers: np.ndarray, prepared: Prepared) -> Measured:
    """A filter's rate from its answers to the probe keys: by lookups as verify measures it (heavy
    keys exact, the tail estimated from the held-out light keys), and by held-out keys."""
    corpus, heavy = prepared.corpus, prepared.heavy
    strata = verify.strata_of(corpus)
    measurement = verify.measure(answers[:heavy], answers[heavy:], strata, prepared.config.gate.confidence)
    by_keys = measurement.false_positive_keys / measurement.keys
    return Measured(label, size, measurement.fpr if corpus.has_counts else None, by_keys)


def plain_bloom(prepared: Prepared, fpr: float) -> Measured:
    """(a): a Bloom filter of every member at fpr, queried with the held-out keys."""
    members = len(prepared.corpus.members)
    bits = bloom_bits(members, fpr)
    bloom = BloomFilter.empty(bits, bloom_hashes(bits, members), prepared.config.filters.hash_seed)
    bloom.insert(prepared.corpus.members)
    return measured("plain Bloom", bloom.nbytes, bloom.query_hashes(prepared.probe_hashes), prepared)


def plain_bloom_bytes(members: int, fpr: float) -> int:
    """Bytes of the bit array of a plain Bloom filter at fpr, as `plain_bloom` builds it."""
    return 8 * word_count(bloom_bits(members, fpr))


def probe_answers(probe_scores: np.ndarray, prepared: Prepared, boundaries, filters) -> np.ndarray:
    """The probe keys' answers from their scores, the boundaries and the region filters: the
    loader's own rule (`MembershipFilter.contains_many`), on scores and hashes computed once."""
    regions = region_of(probe_scores, boundaries)
    answers = np.zeros(len(probe_scores), dtype=bool)
    for index, region in enumerate(filters):
        mask = regions == index
        if mask.any():
            answers[mask] = region.query_hashes(prepared.probe_hashes.select(mask), prepared.config.filters.hash_seed)
    return answers


@dataclass(frozen=True)
class Built:
    """An artifact written to a file, with its answers to the probe keys (computed from scores)."""

    path: Path
    filters: list
    answers: np.ndarray


def build_artifact(prepared: Prepared, path: Path, forest, plan, member_scores, probe_scores) -> Built:
    """The filters of a plan (anything with `boundaries` and `fprs`), packaged with the forest."""
    seed = prepared.config.filters.hash_seed
    sparing = spare_filters(prepared.corpus, member_scores, probe_scores[: prepared.heavy], plan, prepared.config)
    filters = fill_filters(run_in_process, prepared.corpus, member_scores, prepared.config, plan, sparing.filters)
    write_package.fn(path, prepared.spec, forest, plan, filters, seed, {"benchmark": path.stem}, None)
    return Built(path, filters, probe_answers(probe_scores, prepared, plan.boundaries, filters))


def through_loader(prepared: Prepared, built: Built, label: str) -> Measured:
    """Verify an artifact as the verify stage does (every member, heavy key and held-out key through
    the loader) and check that the answers computed from scores agree with the loader's."""
    checked = verify_package(run_in_process, built.path, prepared.corpus, prepared.config)
    if checked.false_negatives:
        raise AssertionError(f"{built.path}: {checked.false_negatives} members answered no (invariant 1 broken)")
    result = measured(label, built.path.stat().st_size, built.answers, prepared)
    found = checked.heldout.false_positive_keys + checked.heldout.heavy_false_positive_keys
    if found != int(built.answers.sum()):
        raise AssertionError(f"{built.path}: the loader's false positives differ from those computed from scores")
    return result


def cheapest_one_threshold(prepared, folder, forest, scores, probe_scores, reference: float) -> Measured | None:
    """(b) at equal measured FPR: of the one-threshold filters planned at reference x 2^(j/4), j in
    ONE_THRESHOLD_STEPS, the smallest whose measured held-out rate is at most the reference (None
    if none is). Choosing among them on the held-out keys can only flatter this baseline."""
    best = None
    for step in ONE_THRESHOLD_STEPS:
        planned = reference * 2.0 ** (step / 4)
        if planned >= 1.0:
            continue
        single = plan_single_threshold(scores.member_scores, scores.validation_scores, scores.validation_weights, planned)
        built = build_artifact(prepared, folder / f"one{step:+d}.tamis", forest, single, scores.member_scores, probe_scores)
        candidate = measured("one threshold", built.path.stat().st_size, built.answers, prepared)
        if candidate.rate <= reference and (best is None or candidate.bytes < best[0].bytes):
            best = (candidate, built)
    return None if best is None else through_loader(prepared, best[1], "one threshold")


@dataclass(frozen=True)
class TargetResult:
    """The three filters at one target, the normalised figures at F*, and what explains them."""

    corpus: str
    target: float
    refused: str | None = None
    aim: float = math.nan
    bloom: Measured | None = None
    one: Measured | None = None
    full: Measured | None = None
    bloom_at_full: int | None = None
    static_at_full: StaticFilter | None = None
    one_at_full: Measured | None = None
    ideal: float | None = None
    clamped_ideal: float | None = None
    details: dict | None = None


def refusal(prepared: Prepared, target: float) -> str:
    strata = verify.strata_of(prepared.corpus)
    needed = verify.needed_heldout_lookups(strata, target, prepared.config.gate.confidence)
    return f"refused (min_heldout): the held-out tail has {strata.heldout_lookups:,} lookups, {needed:,.0f} needed"


def backup_row(region) -> dict:
    """One region's backup filter for table 4: its kind, probes or arity, fingerprint width, members,
    budget, stored bits and the bound n log2(1/f) at that budget."""
    bound = lower_bound_bits(region.members, region.fpr_budget) if region.mode in ("bloom", "fuse") else 0.0
    return {"kind": region.mode, "hashes": region.hashes, "width": region.width, "members": region.members,
            "fpr": region.fpr_budget, "bits": 8 * region.nbytes, "bound": bound}


def explain(prepared: Prepared, choice, plan, scores, full: Measured, filters, aim: float, reference: float | None) -> dict:
    """The figures of table 3, among them full - ideal@F* split into its four parts."""
    members = len(prepared.corpus.members)
    edges = segment_edges(scores.validation_scores, prepared.config.regions.segments)
    g, h = segment_shares(scores.member_scores, scores.validation_scores, scores.validation_weights, edges)
    filter_bytes = sum(f.nbytes for f in filters)
    ideal_at_aim = ideal_bytes(members, aim, plan.kl_bits, 0.0)
    clamped_at_aim = clamped_ideal_bytes(plan.member_counts, plan.nonmember_shares, aim, 0.0)
    return {
        "auc": choice.auc,
        "trees": choice.trees,
        "leaves": choice.params["leaves"],
        "model_bytes": choice.model_bytes,
        "regions": plan.regions,
        "clamped": int(np.count_nonzero(plan.fprs >= 1.0)),
        "kl_regions": plan.kl_bits,
        "kl_segments": kl_divergence_bits(g, h),
        # the parts of full - ideal@F*
        "container": full.bytes - choice.model_bytes - filter_bytes,
        "rounding": filter_bytes - clamped_at_aim,
        "clamping": clamped_at_aim - ideal_at_aim,
        "aim_vs_measured": None if reference is None else ideal_at_aim - ideal_bytes(members, reference, plan.kl_bits, 0.0),
        "backups": [backup_row(region) for region in filters],
    }


def compare_at(prepared: Prepared, target: float, folder: Path) -> TargetResult:
    """(a), (b) and (c) at one target, then (a), (b) and the ideal at the full artifact's rate F*."""
    corpus = prepared.corpus
    config = with_overrides(prepared.config, target={"fpr": target})
    strata = verify.strata_of(corpus)
    try:
        verify.require_heldout(strata, target, config.gate, config.corpus.heldout_share)
    except BadInput:
        return TargetResult(prepared.name, target, refused=refusal(prepared, target))
    aim = verify.aim_fpr(target, strata, corpus.check.counts, config.gate.confidence, config.gate.aim_sigmas, config.filters.variants)
    started = time.perf_counter()
    choice = train_model.fn(corpus, prepared.train, prepared.features, aim, config, quiet)
    plan_scores = score_plan_keys(run_in_process, corpus, prepared.features, choice.forest, config)
    plan = settle(run_in_process, corpus, plan_scores, aim, config).plan
    scores = ScoreSample(plan_scores.members, plan_scores.nonmembers, plan_scores.weights)
    probe_scores = score_batch(choice.forest, prepared.probe_features)
    build = functools.partial(
        build_artifact, prepared, forest=choice.forest, member_scores=scores.member_scores, probe_scores=probe_scores
    )
    full_built = build(folder / "full.tamis", plan=plan)
    full = through_loader(prepared, full_built, "full")
    single = plan_single_threshold(scores.member_scores, scores.validation_scores, scores.validation_weights, target)
    one = through_loader(prepared, build(folder / "one.tamis", plan=single), "one threshold")
    log(
        f"{prepared.name} at {target:g}: aim {aim:.4%}, {choice.trees} trees of {choice.params['leaves']} leaves, "
        f"{plan.regions} regions, {full.bytes:,} bytes, measured {full.rate:.4%} ({time.perf_counter() - started:.0f} s)"
    )
    reference = full.rate if full.rate > 0 else None
    members = len(corpus.members)
    result = TargetResult(prepared.name, target, None, aim, plain_bloom(prepared, target), one, full)
    details = {**explain(prepared, choice, plan, scores, full, full_built.filters, aim, reference), "one_threshold": single}
    if reference is None:
        return dataclasses.replace(result, details=details)
    return dataclasses.replace(
        result,
        bloom_at_full=plain_bloom_bytes(members, reference),
        static_at_full=best_static_filter(members, reference),
        one_at_full=cheapest_one_threshold(prepared, folder, choice.forest, scores, probe_scores, reference),
        ideal=ideal_bytes(members, reference, plan.kl_bits, choice.model_bytes),
        clamped_ideal=clamped_ideal_bytes(plan.member_counts, plan.nonmember_shares, reference, choice.model_bytes),
        details=details,
    )


# Report ------------------------------------------------------------------------------------------


def percent(value: float | None) -> str:
    return "-" if value is None else f"{value:.4%}"


def ratio(top: float | None, bottom: float | None) -> str:
    return "-" if top is None or not bottom else f"{top / bottom:.3f}"


def count(value: float | None) -> str:
    return "-" if value is None else f"{round(value):,}"


def as_built_table(results: Sequence[TargetResult]) -> None:
    print("Table 1. As built at each target. FPR measured on the held-out non-members, by lookups (corpora with")
    print("counts) and by distinct keys; bytes of the bit array (plain Bloom) or of the artifact file (the others)")
    print(
        f"{'corpus':<13} {'target':>7} {'aim':>8} {'filter':<14} {'bytes':>11} {'FPR lookups':>12} {'FPR keys':>10} "
        f"{'vs Bloom':>9} {'vs one':>7}"
    )
    for r in results:
        if r.refused:
            print(f"{r.corpus:<13} {r.target:>7g} {'-':>8} {r.refused}")
            continue
        for m in (r.bloom, r.one, r.full):
            print(
                f"{r.corpus:<13} {r.target:>7g} {r.aim:>8.4%} {m.label:<14} {m.bytes:>11,} {percent(m.by_lookups):>12} "
                f"{percent(m.by_keys):>10} {ratio(m.bytes, r.bloom.bytes):>9} {ratio(m.bytes, r.one.bytes):>7}"
            )


def goal_verdicts(r: TargetResult) -> str:
    """The goals that apply to this row, each met or MISSED."""
    if r.corpus == "demo" and r.target == GOAL_TARGET:
        checks = {
            f"full/Bloom<={GOAL_VS_BLOOM}": r.full.bytes <= GOAL_VS_BLOOM * r.bloom_at_full,
            f"full/one<={GOAL_VS_ONE_THRESHOLD}": r.one_at_full is not None and r.full.bytes <= GOAL_VS_ONE_THRESHOLD * r.one_at_full.bytes,
            f"full/ideal<={GOAL_VS_IDEAL}": r.full.bytes <= GOAL_VS_IDEAL * r.ideal,
        }
    elif r.corpus.startswith("words"):
        checks = {"full<Bloom@F*": r.full.bytes < r.bloom_at_full, "full<Bloom@target (table 1)": r.full.bytes < r.bloom.bytes,
                  "full<static@F*": r.full.bytes < r.static_at_full.bytes}
    elif r.corpus == "hex":
        checks = {f"full/Bloom<={GOAL_HEX_VS_BLOOM}": r.full.bytes <= GOAL_HEX_VS_BLOOM * r.bloom_at_full}
    else:
        return ""
    return ", ".join(f"{name} {'met' if ok else 'MISSED'}" for name, ok in checks.items())


def equal_fpr_table(results: Sequence[TargetResult]) -> None:
    print()
    print("Table 2. At equal measured FPR F* (the full artifact's held-out rate, by lookups when there are counts)")
    print(
        f"{'corpus':<13} {'target':>7} {'F*':>9} {'Bloom@F*':>10} {'static@F*':>16} {'one@F*':>10} {'its FPR':>9} {'full':>10} "
        f"{'ideal@F*':>10} {'clamped@F*':>10} {'one/Bloom':>9} {'full/Bloom':>10} {'full/static':>11} {'full/one':>8} "
        f"{'full/ideal':>10} {'full/clamped':>12}  goals"
    )
    for r in results:
        if r.refused or r.bloom_at_full is None:
            print(f"{r.corpus:<13} {r.target:>7g} {r.refused or 'no false positive measured: F* is 0, nothing to compare at'}")
            continue
        one, static = r.one_at_full, r.static_at_full
        static_text = f"{static.bytes:,} {static.kind}"
        print(
            f"{r.corpus:<13} {r.target:>7g} {percent(r.full.rate):>9} {r.bloom_at_full:>10,} {static_text:>16} "
            f"{count(one and one.bytes):>10} "
            f"{percent(one and one.rate):>9} {r.full.bytes:>10,} {r.ideal:>10,.0f} {r.clamped_ideal:>10,.0f} "
            f"{ratio(one and one.bytes, r.bloom_at_full):>9} {ratio(r.full.bytes, r.bloom_at_full):>10} "
            f"{ratio(r.full.bytes, static.bytes):>11} {ratio(r.full.bytes, one and one.bytes):>8} "
            f"{ratio(r.full.bytes, r.ideal):>10} {ratio(r.full.bytes, r.clamped_ideal):>12}  {goal_verdicts(r)}"
        )
    print(
        f"Bloom@F*: the formula's bytes at F*; static@F*: the smaller of that Bloom filter and a binary fuse filter with\n"
        f"2^-r <= F* (`tamis.baselines.best_static_filter`), no model; one@F*: the smallest of {len(ONE_THRESHOLD_STEPS)} one-threshold filters "
        "planned at F*/4 .. 4 F* whose measured FPR ('its FPR') is at most F*;\nideal@F*: n (log2(1/F*) - D) / ln 2 / 8 + "
        "model bytes; clamped@F*: the same regions' KKT budgets capped at 1 (the reachable ideal)"
    )


def diagnostics_table(results: Sequence[TargetResult]) -> None:
    print()
    print("Table 3. What explains the sizes of the full artifact (D in bits; the last four columns add up to full - ideal@F*)")
    print(
        f"{'corpus':<13} {'target':>7} {'AUC':>7} {'trees':>5} {'leaves':>6} {'model B':>8} {'k':>2} {'f=1':>3} "
        f"{'D regions':>9} {'D segments':>10} {'one: above t':>12} {'members below':>13} "
        f"{'container':>9} {'rounding':>8} {'clamping':>8} {'aim vs F*':>9}"
    )
    for r in results:
        if r.refused:
            continue
        d, single = r.details, r.details["one_threshold"]
        print(
            f"{r.corpus:<13} {r.target:>7g} {d['auc']:>7.4f} {d['trees']:>5} {str(d['leaves']):>6} {d['model_bytes']:>8,} "
            f"{d['regions']:>2} {d['clamped']:>3} {d['kl_regions']:>9.3f} {d['kl_segments']:>10.3f} "
            f"{single.share_above:>12.4%} {single.members_below:>13,} {count(d['container']):>9} {count(d['rounding']):>8} "
            f"{count(d['clamping']):>8} {count(d['aim_vs_measured']):>9}"
        )
    print(
        "one: above t / members below: the one-threshold filter at the target (share of validation lookups at or above\n"
        "its threshold, members in its backup); container: artifact bytes beyond the model's priced bytes and the filters'\n"
        "bits; rounding: filter bits beyond n_i log2(1/f_i) / ln 2 (integer probes, bits, words); clamping: the clamped\n"
        "ideal beyond the formula, both at the aim; aim vs F*: the formula at the aim beyond the formula at F*"
    )


def backup_table(results: Sequence[TargetResult]) -> None:
    print()
    print("Table 4. The backup filters of the full artifact against the bound sum_i n_i log2(1/f_i) at their budgets f_i")
    print(
        f"{'corpus':<13} {'target':>7} {'region':>6} {'kind':<6} {'k/arity':>7} {'r':>3} {'members':>9} {'budget':>10} "
        f"{'bits':>10} {'bound bits':>12} {'factor':>7}"
    )
    for r in results:
        if r.refused:
            continue
        rows = r.details["backups"]
        for index, row in enumerate(rows):
            if row["kind"] not in ("bloom", "fuse"):
                print(f"{r.corpus:<13} {r.target:>7g} {index:>6} {row['kind']:<6} {'-':>7} {'-':>3} {row['members']:>9,} {percent(row['fpr']):>10}")
                continue
            print(
                f"{r.corpus:<13} {r.target:>7g} {index:>6} {row['kind']:<6} {row['hashes']:>7} {row['width'] or '-':>3} "
                f"{row['members']:>9,} {percent(row['fpr']):>10} {row['bits']:>10,} {row['bound']:>12,.0f} {ratio(row['bits'], row['bound']):>7}"
            )
        bits, bound = sum(row["bits"] for row in rows), sum(row["bound"] for row in rows)
        goal = ""
        if r.corpus == "demo" and r.target == GOAL_TARGET:
            goal = f"  backup/bound<={GOAL_BACKUP_VS_BOUND} {'met' if bits <= GOAL_BACKUP_VS_BOUND * bound else 'MISSED'}"
        print(f"{r.corpus:<13} {r.target:>7g} {'all':>6} {'':<6} {'':>7} {'':>3} {'':>9} {'':>10} {bits:>10,} {bound:>12,.0f} {ratio(bits, bound):>7}{goal}")
    print("k/arity: a Bloom filter's probes or a fuse filter's slots per key; r: fingerprint bits; factor: bits / bound")
    print("(a Bloom filter at its optimum: 1/ln 2 = 1.443; bits include each array's rounding to whole 64-bit words)")


# Command line ------------------------------------------------------------------------------------


def parse_targets(text: str) -> tuple[float, ...]:
    try:
        targets = tuple(float(part) for part in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(f"targets must be comma-separated rates like 0.001,0.01, got {text!r}") from None
    if not all(0 < t < 0.5 for t in targets):
        raise argparse.ArgumentTypeError(f"every target must lie in (0, 0.5), got {text!r}")
    return targets


def parse_corpora(text: str) -> tuple[str, ...]:
    names = tuple(part.strip() for part in text.split(","))
    unknown = [n for n in names if n not in CORPORA]
    if unknown:
        raise argparse.ArgumentTypeError(f"unknown corpus {', '.join(unknown)}; choose from {', '.join(CORPORA)}")
    return names


def main(argv: Sequence[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help=f"a {QUICK_DEMO[0]:,}-member demo and one small model candidate")
    parser.add_argument("--targets", type=parse_targets, default=DEFAULT_TARGETS, help="comma-separated target FPRs (default 0.001,0.01,0.05)")
    parser.add_argument("--corpus", type=parse_corpora, default=CORPORA, help=f"comma-separated corpora (default {','.join(CORPORA)})")
    parser.add_argument("--demo-members", type=int, help="demo members (default 200,000; --quick 20,000)")
    parser.add_argument("--demo-non-members", type=int, help="demo non-members (default 2,000,000; --quick 200,000)")
    parser.add_argument("--max-region-fpr", type=float, help="[regions] max_region_fpr for every build (default: the config's, no cap)")
    args = parser.parse_args(argv)
    default_size = QUICK_DEMO if args.quick else (200_000, 2_000_000)
    demo_size = (args.demo_members or default_size[0], args.demo_non_members or default_size[1])
    model = QUICK_MODEL if args.quick else {}
    regions = {"max_region_fpr": args.max_region_fpr}
    results = []
    with tempfile.TemporaryDirectory(prefix="tamis-compare-") as scratch:
        for name in args.corpus:
            prepared = prepare(name, Path(scratch) / name, demo_size, model, regions)
            for target in args.targets:
                folder = Path(scratch) / name / f"target-{target:g}"
                folder.mkdir()
                results.append(compare_at(prepared, target, folder))
    as_built_table(results)
    equal_fpr_table(results)
    diagnostics_table(results)
    backup_table(results)


if __name__ == "__main__":
    main()
