"""Builds on heavy-tailed and count-free corpora through `tamis build`, as a nightly run calls it.

Run: .venv/bin/python benchmarks/heavy_tail.py CASE [--members 300000] [--non-members 2700000]
         [--seeds 1] [--target 0.01] [--heavy-count 0]

CASE is one of:
    pareto     the Emberfall demo keys with lookup counts drawn from a Pareto law of shape 1.2
               (count = floor(X), X Pareto with minimum 1: most keys once, a few hundreds of
               thousands of times; the law of the trade for heavy-tailed popularity, V. Pareto 1896)
    keys       the same keys without counts (every key one lookup)
    demo       the Emberfall demo corpus with its own lookup counts (Zipf-like, capped at 1,000)
    words      the open word corpus of benchmarks/word_corpus.py (needs the bench extra; --members
               and --non-members do not apply): English words against foreign words weighted by
               their frequency
    zipf       a known lookup law: the non-members' popularity Zipf by rank (exponent 1), a window
               of --lookups lookups drawn multinomially; the script also prints the artifact's exact
               future rate sum_k pi_k a_k over every non-member, looked up in the window or not

--heavy-count sets tau (corpus.heavy_count); running a case at several values compares the bytes
of the build's rule (0, tau = 44) with other cutoffs.

For each seed (the corpus seed and the split seed both move with it) it writes the corpus into a
temporary folder, runs `tamis build` on the demo defaults (configs/demo.toml) at the target in a
fresh process, and prints one line: published or refused, the aim, the rate and its upper bound,
the heavy keys and their share of lookups, the artifact's bytes and its ratio to a plain Bloom
filter at the target. The last line counts the builds the gate passed.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import polars as pl

from tamis.demo import write_demo_corpus
from tamis.loader import open_filter
from tamis.publish import current_artifact

import word_corpus  # benchmarks/word_corpus.py: this script's folder is on sys.path when it runs

TAMIS = [str(Path(sys.executable).with_name("tamis"))]
DEMO_CONFIG = Path(__file__).resolve().parents[1] / "configs" / "demo.toml"
PARETO_SHAPE = 1.2


def write_config(folder: Path, members: Path, lookups: Path, target: float, seed: int, heavy_count: int) -> tuple[Path, Path]:
    """The demo defaults with this corpus, target, split seed and tau, and a fresh store."""
    store = folder / "store"
    config = folder / "build.toml"
    text = (
        DEMO_CONFIG.read_text()
        .replace("[corpus]\n", f'[corpus]\nmembers = "{members}"\nnon_members = "{lookups}"\nheavy_count = {heavy_count}\n', 1)
        .replace("split_seed = 31281", f"split_seed = {31281 + seed}")
        .replace("fpr = 0.01", f"fpr = {target}")
        .replace("[store]\n", f'[store]\npath = "{store}"\n', 1)
    )
    config.write_text(text)
    return config, store


def write_case(case: str, folder: Path, members: int, non_members: int, seed: int, lookups: int):
    """The corpus files of a case, and for `zipf` every non-member with its lookup law pi."""
    if case == "words":
        members_path, table = word_corpus.write_word_corpus(folder)
        return members_path, table, ([], None)
    members_path, table = write_demo_corpus(folder, members=members, non_members=non_members, seed=seed)
    if case == "demo":
        return members_path, table, ([], None)
    keys = pl.read_parquet(table).select("key")
    rng = np.random.default_rng(seed)
    law = None
    population = keys["key"].to_list()
    if case == "pareto":
        keys = keys.with_columns(pl.Series("count", np.floor(rng.pareto(PARETO_SHAPE, len(keys)) + 1.0).astype(np.int64)))
    elif case == "zipf":
        law = 1.0 / np.arange(1, len(keys) + 1, dtype=np.float64)
        law = rng.permutation(law / law.sum())
        keys = keys.with_columns(pl.Series("count", rng.multinomial(lookups, law)))
        seen = keys["count"].to_numpy() > 0
        keys = keys.filter(pl.Series(seen))
    path = folder / f"{case}.parquet"
    keys.write_parquet(path)
    return members_path, path, (population, law)


def exact_rate(store: Path, population: list[str], law: np.ndarray) -> float:
    """sum_k pi_k a_k over every non-member of the law, looked up in the window or not."""
    return float(law[open_filter(current_artifact(store)).contains_many(population)].sum())


def one_build(case: str, seed: int, args) -> bool:
    with tempfile.TemporaryDirectory(prefix="tamis-heavy-") as scratch:
        folder = Path(scratch)
        members, table, (population, law) = write_case(case, folder, args.members, args.non_members, seed, args.lookups)
        config, store = write_config(folder, members, table, args.target, seed, args.heavy_count)
        started = time.perf_counter()
        done = subprocess.run(TAMIS + ["build", str(config)], capture_output=True, text=True)
        reports = sorted(store.glob("*/report.json")) + sorted(store.glob("refused/*/report.json"))
        if not reports:
            print(f"seed {seed}: exit {done.returncode}: {done.stderr.strip().splitlines()[-1] if done.stderr else ''}", flush=True)
            return False
        report = json.loads(reports[0].read_text())
        strata, held, base = report["strata"], report["heldout"], report["baseline"]
        exact = f", exact future rate {exact_rate(store, population, law):.4%}" if law is not None and report["gate"]["passed"] else ""
        print(
            f"seed {seed}: {'published' if report['gate']['passed'] else 'REFUSED'} (exit {done.returncode}); "
            f"aim {report['aim_fpr']:.4%}, rate {held['fpr']:.4%}, bound {held['fpr_upper']:.4%}; "
            f"tau {strata['tau']}, {strata['heavy_keys']:,} heavy keys with {strata['heavy_share']:.1%} of lookups, "
            f"heavy false positives {strata['heavy_false_positive_share']:.4%}; {report['size']['total_bytes']:,} bytes, "
            f"{base['ratio']:.3f} x plain Bloom{exact}; {time.perf_counter() - started:.0f} s",
            flush=True,
        )
        return bool(report["gate"]["passed"])


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("case", choices=("pareto", "keys", "zipf", "demo", "words"))
    parser.add_argument("--members", type=int, default=300_000)
    parser.add_argument("--non-members", type=int, default=2_700_000)
    parser.add_argument("--lookups", type=int, default=2_000_000, help="window lookups of the zipf case")
    parser.add_argument("--seeds", type=int, default=1)
    parser.add_argument("--target", type=float, default=0.01)
    parser.add_argument("--heavy-count", type=int, default=0, help="corpus.heavy_count (0: the build's rule)")
    args = parser.parse_args(argv)
    passed = sum(one_build(args.case, seed, args) for seed in range(args.seeds))
    print(f"{args.case}: the gate passed {passed} of {args.seeds} builds "
          f"({args.members:,} members, {args.non_members:,} non-members, target {args.target:g})")


if __name__ == "__main__":
    main()
