"""The plan against what gets built: builds through `tamis build` and their figures, side by side.

Run: .venv/bin/python benchmarks/plan_figures.py [CASE ...]   (default: every case; about 5 minutes)

Cases (each written into a temporary folder, built on the demo defaults, configs/demo.toml, at its
target, in a fresh process, as a nightly run calls it):

    demo        the Emberfall demo corpus (200,000 members, 2,000,000 non-members), target 1%
    prefixes    20,000 members "zz", "qx" or "kv" + 12 random hex digits against 200,000
                non-members "ab", "cd", "ef" or "zz" + 12 random hex digits, counts 1 to 5, at 1%
    noise       3,000 keys of 16 random hex digits against 30,000 more, one lookup each, at 5%
                (no model can separate them)
    words-key   the open word corpus (benchmarks/word_corpus.py, the bench extra): English words
                against the foreign words, one lookup each, at 1%
    words-freq  the same weighted by the words' frequencies, at 1%

For each build it prints: published or refused, the aim, every plan round (the rate it was made
for, its own estimate of the built filters and what the heavy keys' outcome allowed), the held-out
rate and its upper bound, the bytes and their ratio to a plain Bloom filter at the target and to
the best plain static filter (both sized in the same build, report.json "baseline"), the share of
the build's time spent planning (the filters stage: every plan made, built and estimated), then
per region its rate as built beside its measured rate on the held-out keys there.
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

import word_corpus  # benchmarks/word_corpus.py: this script's folder is on sys.path when it runs
from heavy_tail import TAMIS, write_config

CASES = ("demo", "prefixes", "noise", "words-key", "words-freq")
TARGETS = {"demo": 0.01, "prefixes": 0.01, "noise": 0.05, "words-key": 0.01, "words-freq": 0.01}


def hex_keys(rng: np.random.Generator, prefixes: list[str], count: int, digits: int) -> list[str]:
    """`count` distinct keys, sorted: a prefix drawn from `prefixes` then `digits` random hex digits."""
    keys: set[str] = set()
    while len(keys) < count:
        need = count - len(keys)
        heads = rng.choice(prefixes, need)
        tails = rng.integers(0, 2 ** (4 * digits), need, dtype=np.uint64)
        keys.update(f"{h}{int(t):0{digits}x}" for h, t in zip(heads, tails))
    return sorted(keys)


def write_case(case: str, folder: Path) -> tuple[Path, Path]:
    """The members file and non-member table of a case."""
    if case == "demo":
        return write_demo_corpus(folder)
    if case.startswith("words"):
        members, table = word_corpus.write_word_corpus(folder)
        if case == "words-key":
            pl.read_parquet(table).with_columns(pl.lit(1, dtype=pl.Int64).alias("count")).write_parquet(table)
        return members, table
    rng = np.random.default_rng(19)
    if case == "prefixes":
        members = hex_keys(rng, ["zz", "qx", "kv"], 20_000, 12)
        others = sorted(set(hex_keys(rng, ["ab", "cd", "ef", "zz"], 200_000 + 50, 12)) - set(members))[:200_000]
        counts = rng.integers(1, 6, len(others))
    else:
        both = hex_keys(rng, [""], 33_000, 16)
        order = rng.permutation(len(both))
        members, others = [both[i] for i in order[:3_000]], sorted(both[i] for i in order[3_000:])
        counts = np.ones(len(others), dtype=np.int64)
    members_path, table = folder / "members.txt", folder / "lookups.parquet"
    members_path.write_text("".join(f"{key}\n" for key in members))
    pl.DataFrame({"key": others, "count": counts.astype(np.int64)}).write_parquet(table)
    return members_path, table


def one_case(case: str) -> dict:
    with tempfile.TemporaryDirectory(prefix="tamis-plan-") as scratch:
        folder = Path(scratch)
        members, table = write_case(case, folder)
        config, store = write_config(folder, members, table, TARGETS[case], 0, 0)
        started = time.perf_counter()
        done = subprocess.run(TAMIS + ["build", str(config)], capture_output=True, text=True)
        reports = sorted(store.glob("*/report.json")) + sorted(store.glob("refused/*/report.json"))
        if not reports:
            print(f"{case}: exit {done.returncode}: {done.stderr.strip()[-400:]}", flush=True)
            return {}
        report = json.loads(reports[0].read_text())
    held, base, timings = report["heldout"], report["baseline"], report["timings"]
    print(f"{case} at {report['target_fpr']:g}: {'published' if report['gate']['passed'] else 'REFUSED'}, "
          f"aim {report['aim_fpr']:.4%}, {time.perf_counter() - started:.0f} s")
    for index, r in enumerate(report["plan"]["rounds"]):
        allowed = "none" if r["allowed"] is None else f"{r['allowed']:.4%}"
        mark = "  <- built" if index == report["plan"]["chosen"] else ""
        print(f"  plan {index}: made for {r['rate']:.4%}, estimate {r['estimate']:.4%}, allowed {allowed}, {r['bytes']:,} bytes{mark}")
    print(f"  held-out rate {held['fpr']:.4%}, upper bound {held['fpr_upper']:.4%}; {report['size']['total_bytes']:,} bytes: "
          f"{base['ratio']:.3f} of a plain Bloom filter at the target ({base['bloom_bytes']:,}), "
          f"{base['static_ratio']:.3f} of the best plain static filter ({base['static_kind']}, {base['static_bytes']:,})")
    print(f"  planning (filters stage) {timings['filters']:.1f} s of {timings['total']:.1f} s: {timings['filters'] / timings['total']:.1%}")
    for index, row in enumerate(report["regions"]):
        measured = "-" if row["measured_fpr"] is None else f"{row['measured_fpr']:.4%}"
        print(f"  R{index} {row['mode']:>5} {row['members']:>8,} members: as built {row['planned_fpr']:.4%}, "
              f"measured {measured} on {row['measured_keys']:,} held-out keys")
    if not report["gate"]["passed"]:
        print("  " + "\n  ".join(report["gate"]["reasons"]))
    sys.stdout.flush()
    return report


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("cases", nargs="*", metavar="CASE", help=f"any of {', '.join(CASES)} (default: every case)")
    args = parser.parse_args(argv)
    if unknown := sorted(set(args.cases) - set(CASES)):
        parser.error(f"unknown cases {unknown}; choose from {', '.join(CASES)}")
    args.cases = args.cases or list(CASES)
    print(f"{time.strftime('%Y-%m-%d %H:%M')}: benchmarks/plan_figures.py {' '.join(args.cases)}")
    for case in args.cases:
        one_case(case)


if __name__ == "__main__":
    main()
