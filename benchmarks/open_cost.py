"""What opening an artifact costs a service: wall time and resident memory per answer path, against
the file's size, at a given member count.

Run: .venv/bin/python benchmarks/open_cost.py [--members 10000000] [--fpr 0.01] [--baseline-root DIR]

Writes two artifacts of the size a build of MEMBERS members would have if every member sat in one
region at the target rate: one Bloom region, and one binary fuse region (the forest, feature spec
and hashing of the format's reference artifact, tests/data/format-1.0.tamis; the filter's words
are random, as in a full filter: opening reads and checks every byte whatever they are). This is
the large end: the demo's learned artifact takes about 3 bits a member, a plain Bloom filter at 1% 9.6.

Then, in a fresh process for each artifact and answer path (imports not counted; the path first
warmed on the small reference artifact, so numba's compiled code is not counted either), it opens
the file and answers 100,000 keys, and prints the wall seconds of `open_filter`, the resident memory
it added (VmRSS) and that memory as a multiple of the file's size (the loader's aim: at most 1.1 x
the file plus a constant), and the seconds and added memory of the first batch. With
--baseline-root, the same is measured for the `tamis` package found in DIR (e.g. a copy of an
earlier release's code), in the same run, for a ratio.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
REFERENCE = ROOT / "tests" / "data" / "format-1.0.tamis"

PROBE = r"""
import json, sys, time
def rss():
    for line in open("/proc/self/status"):
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) * 1024
from tamis.loader import open_filter
keys = [b"probe-%d" % i for i in range(100_000)]
path = sys.argv[2]
open_filter(sys.argv[3], answer_path=path).contains_many(keys[:1000])  # warm: compiled code, first-use allocations
before = rss(); t = time.perf_counter()
loaded = open_filter(sys.argv[1], answer_path=path)
opened = time.perf_counter() - t; after_open = rss()
t = time.perf_counter(); loaded.contains_many(keys); answered = time.perf_counter() - t
print(json.dumps({"open_s": opened, "open_rss": after_open - before, "batch_s": answered, "batch_rss": rss() - after_open}))
"""


def _random_words(count: int) -> np.ndarray:
    return np.random.default_rng(0).integers(0, 2**64, count, dtype=np.uint64, endpoint=False)


def bloom_region(members: int, fpr: float) -> tuple[dict, np.ndarray]:
    from tamis.sizing import bloom_bits, bloom_hashes

    bits = bloom_bits(members, fpr)
    return {"mode": "bloom", "bits": bits, "hashes": bloom_hashes(bits, members)}, _random_words(-(-bits // 64))


def fuse_region(members: int, fpr: float) -> tuple[dict, np.ndarray]:
    from tamis.sizing import fuse_layout

    width, arity = max(1, math.ceil(-math.log2(fpr))), 4  # r bits give a rate of 2^-r (common practice)
    layout = fuse_layout(members, arity, 1.0)
    region = {"mode": "fuse", "bits": 0, "hashes": arity, "width": width, "seed": 0,
              "segment_length": layout.segment_length, "segment_count": layout.segment_count}
    return region, _random_words(layout.word_count(width))


REGION_KINDS = {"bloom": bloom_region, "fuse": fuse_region}


def write_scaled(path: Path, members: int, fpr: float, kind: str) -> int:
    """The reference artifact with one region of `kind` sized for `members` at `fpr`; returns its bytes."""
    from tamis.artifact import read_artifact, write_artifact

    header, sections = read_artifact(REFERENCE)
    region, words = REGION_KINDS[kind](members, fpr)
    arrays = {k: np.array(v) for k, v in sections.items() if not k.startswith("filter.")}
    arrays["filter.0"] = words
    region = {**region, "section": "filter.0", "members": members, "fpr_budget": fpr}
    write_artifact(path, {**header, "boundaries": [], "regions": [region]}, arrays)
    return path.stat().st_size


def measure(path: Path, answer_path: str, root: Path | None) -> dict:
    env = dict(os.environ)
    if root is not None:
        env["PYTHONPATH"] = str(root)
    done = subprocess.run([sys.executable, "-c", PROBE, str(path), answer_path, str(REFERENCE)],
                          capture_output=True, text=True, env=env, check=True)
    return json.loads(done.stdout)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--members", type=int, default=10_000_000)
    parser.add_argument("--fpr", type=float, default=0.01)
    parser.add_argument("--baseline-root", type=Path, help="a folder holding another `tamis` package to compare")
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    from tamis.query import available_paths

    roots = {"this loader": None} | ({"baseline": args.baseline_root} if args.baseline_root else {})
    with tempfile.TemporaryDirectory() as work:
        for kind in REGION_KINDS:
            path = Path(work) / f"scaled-{kind}.tamis"
            size = write_scaled(path, args.members, args.fpr, kind)
            print(f"{kind} artifact for {args.members:,} members at {args.fpr:g}: {size:,} bytes "
                  f"({size * 8 / args.members:.2f} bits a member)")
            for answer_path in available_paths():
                best = {}
                for name, root in roots.items():
                    runs = [measure(path, answer_path, root) for _ in range(args.repeat)]
                    best[name] = {key: min(run[key] for run in runs) for key in runs[0]}
                    row = best[name]
                    print(f"  {answer_path:8s} {name:12s} open {row['open_s'] * 1000:8.1f} ms "
                          f"(+{row['open_rss'] / 2**20:6.1f} MiB, {row['open_rss'] / size:.2f} x the file)   "
                          f"first 100,000 keys {row['batch_s'] * 1000:8.1f} ms (+{row['batch_rss'] / 2**20:6.1f} MiB)"
                          f"   (best of {args.repeat})")
                if "baseline" in best:
                    ours, base = best["this loader"], best["baseline"]
                    print(f"  {answer_path:8s} ratio this / baseline: open memory {ours['open_rss'] / base['open_rss']:.2f}, "
                          f"open time {ours['open_s'] / base['open_s']:.2f}, open + first batch time "
                          f"{(ours['open_s'] + ours['batch_s']) / (base['open_s'] + base['batch_s']):.2f}")

if __name__ == "__main__":
    main()
