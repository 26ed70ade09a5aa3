"""Lookup speed of the loader on the demo artifact, against a plain Bloom filter.

Run: .venv/bin/python benchmarks/lookup_speed.py [--artifact PATH] [--members N] [--non-members N]
                                                 [--keys N] [--budgets 120,240,480 | none] [--key-type str]

Builds the Emberfall demo corpus (pipeline.demo, seeded) and, through the stage functions (not the
CLI), one artifact per query-cost budget (ModelSettings.max_nodes_per_key), unless --artifact names
the one to measure. Then, in one run, it prints:

1. batch `contains_many` of --keys keys (held-out non-members and members, shuffled, as str) in keys/s;
2. single-key `contains`, p50 and p99 latency;
3. the same keys through a plain Bloom filter (`tamis.bloom`) holding the same members at the
   same target false-positive rate, and through a loop of one xxh3_64 call per key: the baselines
   the figures are divided by (batch keys/s as a share of the xxh3 loop's; a single `contains` as
   so many xxh3 calls' worth of time);
4. the batch profile: packing, features, trees, hashing and probes, each on its own;
5. the curve of artifact bytes against batch lookup speed over the budgets;
6. the cost of opening the artifact in a fresh process, with numba's cache cold and warm.

Figures 1, 2, 4 and 5 are given for the numpy path and, when numba is installed, for the compiled
path (`tamis.query`), side by side in the same run; both give the same answers, which the run checks.

Every time is given as CPU seconds of this process (time.process_time) and as wall seconds: on a
shared machine the CPU figure is the steadier one. Each batch figure is the best of --repeat runs;
the xxh3 baselines are timed in turn with the figures divided by them.
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
import xxhash

from tamis import compiled
from tamis.bloom import BloomFilter
from tamis.sizing import bloom_bits, bloom_hashes
from tamis.config import load_config
from tamis.corpus import load_corpus
from tamis.demo import write_demo_corpus
from tamis.features import default_feature_spec, featurize, featurize_columns
from tamis.filters import build_filters
from tamis.loader import MembershipFilter, open_filter
from tamis.model import fit_model
from tamis.package import package_artifact
from tamis.query import available_paths, hashes_where, pack_batch, region_of
from tamis.regions import plan_regions
from tamis.trees import score_batch, score_columns

DEMO_CONFIG = Path(__file__).resolve().parent.parent / "configs" / "demo.toml"
# Single-key latencies are sampled over this many keys (enough for a stable p99).
SINGLE_KEYS = 20_000


@dataclasses.dataclass(frozen=True)
class Timing:
    cpu: float
    wall: float

    def per_key_us(self, keys: int) -> str:
        return f"{self.cpu / keys * 1e6:7.3f} us/key CPU ({self.wall / keys * 1e6:7.3f} wall)"


def best_of(repeat: int, run: Callable[[], object]) -> Timing:
    """The smallest CPU and wall time of `repeat` runs (each minimum taken on its own)."""
    cpu, wall = [], []
    for _ in range(repeat):
        c, w = time.process_time(), time.perf_counter()
        run()
        cpu.append(time.process_time() - c)
        wall.append(time.perf_counter() - w)
    return Timing(min(cpu), min(wall))


def interleaved(repeat: int, runs: dict[str, Callable[[], object]]) -> dict[str, Timing]:
    """`best_of` for each run, their repeats taken in turn, so that a busy moment of a shared
    machine falls on a baseline and on what is divided by it alike."""
    cpu = {name: [] for name in runs}
    wall = {name: [] for name in runs}
    for _ in range(repeat):
        for name, run in runs.items():
            c, w = time.process_time(), time.perf_counter()
            run()
            cpu[name].append(time.process_time() - c)
            wall[name].append(time.perf_counter() - w)
    return {name: Timing(min(cpu[name]), min(wall[name])) for name in runs}


def build_artifact(corpus, X: dict, config, budget: int, path: Path) -> dict:
    """The build flow's stages with the model's query-cost budget set to `budget`."""
    settings = dataclasses.replace(config.model, max_nodes_per_key=budget)
    target = config.target.fpr

    def filter_bytes(member_scores, val_scores, val_weights) -> float:
        return plan_regions(member_scores, val_scores, val_weights, target, config.regions).estimated_total_bits / 8

    started = time.perf_counter()
    choice = fit_model(X["members"], X["train"], corpus.train.counts.astype(np.float64), X["validation"],
                       corpus.validation.counts.astype(np.float64), filter_bytes, settings)
    member_scores = score_batch(choice.forest, X["members"])
    plan = plan_regions(member_scores, score_batch(choice.forest, X["validation"]), corpus.validation.counts,
                        target, config.regions)
    filters = build_filters(corpus.members, region_of(member_scores, plan.boundaries), plan.fprs, config.filters.hash_seed)
    package_artifact(path, feature_spec=default_feature_spec(), forest=choice.forest, boundaries=plan.boundaries,
                     region_filters=filters, hash_seed=config.filters.hash_seed,
                     provenance={"benchmark": "lookup_speed", "max_nodes_per_key": budget})
    return {"budget": budget, "path": path, "trees": choice.trees, "seconds": time.perf_counter() - started}


def query_keys(corpus, count: int, seed: int) -> list[bytes]:
    """`count` lookups: held-out non-members and members in the corpus's proportions, shuffled."""
    pool = corpus.heldout.keys + corpus.members
    rng = np.random.default_rng(seed)
    picked = rng.integers(0, len(pool), count) if count > len(pool) else rng.permutation(len(pool))[:count]
    return [pool[i] for i in picked.tolist()]


def single_key_latency(loaded, keys: list[bytes]) -> tuple[float, float]:
    """p50 and p99 of one `contains` call, in microseconds (wall clock per call)."""
    for key in keys[:200]:
        loaded.contains(key)
    spent = []
    clock = time.perf_counter
    for key in keys:
        start = clock()
        loaded.contains(key)
        spent.append(clock() - start)
    p50, p99 = np.percentile(spent, [50, 99]) * 1e6
    return float(p50), float(p99)


def xxh3_loop(keys: list[bytes]) -> list[int]:
    """The baseline: one xxh3_64 call per key, in a comprehension."""
    digest = xxhash.xxh3_64_intdigest
    return [digest(key) for key in keys]


def one_by_one(loaded, keys: list) -> None:
    """`contains` called once per key (the single-key figure is this loop's time per key)."""
    contains = loaded.contains
    for key in keys:
        contains(key)


def plain_bloom(members: list[bytes], fpr: float, seed: int) -> BloomFilter:
    bits = bloom_bits(len(members), fpr)
    bloom = BloomFilter.empty(bits, bloom_hashes(bits, len(members)), seed)
    bloom.insert(members)
    return bloom


def profile(loaded: MembershipFilter, keys: list, repeat: int) -> dict[str, Timing]:
    """Each step of `contains_many` on its own, over the whole batch, on the filter's answer path."""
    path = loaded._path
    tables = loaded.tables
    packed = pack_batch(keys)
    regions = path.regions(packed)
    hashed = tables.hashed[regions]
    hashes = hashes_where(packed, hashed, tables.seed)
    parts = {"pack keys": best_of(repeat, lambda: pack_batch(keys))}
    if path.name == "numpy":
        columns = featurize_columns(packed.data, packed.offsets, tables.layout)
        scores = score_columns(tables.forest, columns)
        parts |= {
            "features": best_of(repeat, lambda: featurize_columns(packed.data, packed.offsets, tables.layout)),
            "trees": best_of(repeat, lambda: score_columns(tables.forest, columns)),
            "regions": best_of(repeat, lambda: region_of(scores, tables.boundary_array)),
        }

        def answers() -> None:
            for index, region in enumerate(tables.regions):
                region.query_hashes(hashes.select(regions == index))
    else:
        parts["features + trees + region, one kernel"] = best_of(repeat, lambda: path.regions(packed))

        def answers() -> None:
            compiled.answer_regions(regions, hashes.low, hashes.high, path.blob, np.empty(len(keys), dtype=bool))
    return parts | {
        f"hashing ({hashed.mean():.0%} of keys in regions with a filter)": best_of(
            repeat, lambda: hashes_where(packed, hashed, tables.seed)),
        "region answers (Bloom probes, fuse slot reads)": best_of(repeat, answers),
    }


def open_seconds(path: Path, cache: Path | None) -> float:
    """Wall seconds of `open_filter` in a fresh process (imports not counted), numba's cache in
    `cache` (an empty folder: a cold compile) or where numba keeps it (None)."""
    env = dict(os.environ, **({"NUMBA_CACHE_DIR": str(cache)} if cache else {}))
    code = ("import sys, time; from tamis.loader import open_filter; t = time.perf_counter(); "
            "open_filter(sys.argv[1]); print(time.perf_counter() - t)")
    done = subprocess.run([sys.executable, "-c", code, str(path)], env=env, capture_output=True, text=True, check=True)
    return float(done.stdout)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--artifact", type=Path, help="measure this artifact (else the one built at the largest budget)")
    parser.add_argument("--members", type=int, default=200_000)
    parser.add_argument("--non-members", type=int, default=2_000_000)
    parser.add_argument("--seed", type=int, default=7, help="demo corpus seed (tamis demo's default)")
    parser.add_argument("--keys", type=int, default=1_000_000, help="keys in the batch measurement")
    parser.add_argument("--curve-keys", type=int, default=200_000, help="keys per point of the bytes-speed curve")
    parser.add_argument("--budgets", default="120,240,480", help="max_nodes_per_key values for the curve, or 'none'")
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--key-type", choices=("str", "bytes"), default="str", help="how the batch keys are passed")
    parser.add_argument("--work", type=Path, help="folder for the corpus and artifacts (default: a temporary one)")
    args = parser.parse_args()

    work = args.work or Path(tempfile.mkdtemp(prefix="tamis-lookup-speed-"))
    config = load_config(DEMO_CONFIG)
    print(f"demo corpus: {args.members:,} members, {args.non_members:,} non-members, seed {args.seed} (in {work})")
    members_path, lookups_path = write_demo_corpus(work / "corpus", args.members, args.non_members, args.seed)
    corpus = load_corpus(members_path, lookups_path, config.corpus)
    keys = query_keys(corpus, args.keys, args.seed)
    target = config.target.fpr

    budgets = [] if args.budgets == "none" else [int(b) for b in args.budgets.split(",")]
    built = []
    if budgets:
        spec = default_feature_spec()
        X = {name: featurize(part, spec) for name, part in
             (("members", corpus.members), ("train", corpus.train.keys), ("validation", corpus.validation.keys))}
        for budget in budgets:
            built.append(build_artifact(corpus, X, config, budget, work / f"budget-{budget}.tamis"))
            print(f"  built max_nodes_per_key={budget}: {built[-1]['trees']} trees in {built[-1]['seconds']:.0f} s")
    path = args.artifact or (built[-1]["path"] if built else None)
    if path is None:
        parser.error("give --artifact or at least one budget to build")
    loaded = open_filter(path)
    queries = [k.decode("utf-8") for k in keys] if args.key_type == "str" else keys
    paths = list(available_paths())

    bloom = plain_bloom(corpus.members, target, config.filters.hash_seed)
    base = best_of(args.repeat, lambda: bloom.query(keys))
    sample = keys[:SINGLE_KEYS]
    b50, b99 = single_key_latency(bloom, sample)
    on_paths = {name: loaded.using(name) for name in paths}
    # the batch and single-key figures, each in turn with its xxh3 baseline
    timed = interleaved(args.repeat, {"xxh3": lambda: xxh3_loop(keys),
                                      **{name: (lambda f=f: f.contains_many(queries)) for name, f in on_paths.items()}})
    xxh3, batch = timed.pop("xxh3"), timed
    timed = interleaved(args.repeat, {"xxh3": lambda: xxh3_loop(sample),
                                      **{name: (lambda f=f: one_by_one(f, queries[:SINGLE_KEYS])) for name, f in on_paths.items()}})
    xxh3_single = timed.pop("xxh3").cpu / SINGLE_KEYS
    single_mean = {name: timing.cpu / SINGLE_KEYS for name, timing in timed.items()}
    single, parts, answers = {}, {}, {}
    for name, on_path in on_paths.items():
        answers[name] = on_path.contains_many(queries)
        single[name] = single_key_latency(on_path, queries[:SINGLE_KEYS])
        parts[name] = profile(on_path, queries, args.repeat)
    if not all(np.array_equal(answers[name], answers["numpy"]) for name in paths):
        raise SystemExit("the numpy and compiled paths answered differently: a bug, please report it")
    size = path.stat().st_size

    forest = loaded.forest
    print(f"\nartifact {path}: {size:,} bytes, {forest.trees} trees of up to {forest.max_splits + 1} leaves, "
          f"{len(loaded.regions)} regions; numba {'on' if compiled.ENABLED else 'not installed or disabled'}")
    print(f"plain Bloom filter at {target:g}: {bloom.nbytes:,} bytes, {bloom.hashes} probes; "
          f"artifact / Bloom bytes = {size / bloom.nbytes:.3f}")
    print(f"\nbatch of {len(keys):,} keys as {args.key_type} (best of {args.repeat}; the plain Bloom filter takes bytes):")
    for name, timing in [*((f"contains_many, {p}", batch[p]) for p in paths), ("plain Bloom", base)]:
        print(f"  {name:24s} {len(keys) / timing.cpu:12,.0f} keys/s CPU ({len(keys) / timing.wall:12,.0f} wall)   "
              f"{timing.per_key_us(len(keys))}   / Bloom speed {base.cpu / timing.cpu:.3f} CPU")
    print(f"\nagainst a loop of one xxh3_64 call per key (bytes keys; {len(keys) / xxh3.cpu:,.0f} keys/s CPU, "
          f"{xxh3_single * 1e9:.0f} ns a call over {SINGLE_KEYS:,} keys):")
    for name in paths:
        print(f"  {name:14s} contains_many {xxh3.cpu / batch[name].cpu:6.3f} of the xxh3 loop's keys/s;   "
              f"contains {single_mean[name] * 1e6:6.2f} us a key = {single_mean[name] / xxh3_single:6.1f} xxh3 calls")
    print(f"\nsingle key, {len(sample):,} calls (wall clock per call):")
    for name in paths:
        p50, p99 = single[name]
        print(f"  contains, {name:14s} p50 {p50:7.1f} us   p99 {p99:7.1f} us   (ratio p50 to Bloom {p50 / b50:.1f})")
    print(f"  {'plain Bloom':24s} p50 {b50:7.1f} us   p99 {b99:7.1f} us")
    print(f"\nprofile of contains_many's parts over the same {len(keys):,} keys (best of {args.repeat}), us/key CPU:")
    print(f"  {'part':62s}" + "".join(f"{p:>10s}" for p in paths))
    for part in dict.fromkeys(part for p in paths for part in parts[p]):
        cells = "".join(f"{parts[p][part].cpu / len(keys) * 1e6:10.3f}" if part in parts[p] else f"{'-':>10s}" for p in paths)
        print(f"  {part:62s}{cells}")

    if built:
        print(f"\nbytes against batch speed ({args.curve_keys:,} keys each, best of {args.repeat}; Bloom = "
              f"{bloom.nbytes:,} bytes at {len(keys) / base.cpu:,.0f} keys/s CPU):")
        print(f"  {'max_nodes_per_key':>17s} {'trees':>5s} {'bytes':>9s} {'/ Bloom':>8s}"
              + "".join(f" {'keys/s ' + p:>16s} {'/ Bloom':>8s}" for p in paths))
        few = queries[: args.curve_keys]
        for row in built:
            point = open_filter(row["path"])
            point_bytes = row["path"].stat().st_size
            cells = ""
            for name in paths:
                on_path = point.using(name)
                rate = len(few) / best_of(args.repeat, lambda: on_path.contains_many(few)).cpu
                cells += f" {rate:>16,.0f} {rate / (len(keys) / base.cpu):>8.3f}"
            print(f"  {row['budget']:>17d} {row['trees']:>5d} {point_bytes:>9,d} {point_bytes / bloom.nbytes:>8.3f}{cells}")

    if compiled.ENABLED:
        with tempfile.TemporaryDirectory() as cold:
            first = open_seconds(path, Path(cold))
            again = open_seconds(path, Path(cold))
        print(f"\nopen_filter in a fresh process (compiles the kernels): {first:.2f} s with numba's cache empty, "
              f"{again:.2f} s from the cache it left")


if __name__ == "__main__":
    main()
