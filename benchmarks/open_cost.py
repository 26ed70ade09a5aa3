"""What opening an artifact costs a service: wall time and resident memory, at a given member count.

Run: .venv/bin/python benchmarks/open_cost.py [--members 10000000] [--fpr 0.01] [--baseline-root DIR]

Writes an artifact of the size a build of MEMBERS members would have if every member sat in one
Bloom region at the target rate (the forest, feature spec and hashing of the format's reference
artifact, tests/data/format-1.0.tamis; the Bloom filter's bits are random, half of them set, as
in a full filter: opening reads and checks every byte whatever they are). This is the large end:
the demo's learned artifact takes 4.2 bits a member, a plain Bloom filter at 1% 9.6.

Then, in a fresh process for each (imports not counted), it opens the file and answers 100,000 keys,
and prints the wall seconds of `open_filter`, the resident memory it added (VmRSS), and the seconds
and added memory of the first batch. With --baseline-root, the same is measured for the `tamis`
package found in DIR (e.g. a copy of an earlier release's code), in the same run, for a ratio.
"""

from __future__ import annotations

import argparse
import json
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
before = rss(); t = time.perf_counter()
loaded = open_filter(sys.argv[1])
opened = time.perf_counter() - t; after_open = rss()
t = time.perf_counter(); loaded.contains_many(keys); answered = time.perf_counter() - t
print(json.dumps({"open_s": opened, "open_rss": after_open - before, "batch_s": answered, "batch_rss": rss() - after_open}))
"""


def write_scaled(path: Path, members: int, fpr: float) -> int:
    """The reference artifact with one Bloom region sized for `members` at `fpr`; returns its bytes."""
    from tamis.artifact import read_artifact, write_artifact
    from tamis.sizing import bloom_bits, bloom_hashes

    header, sections = read_artifact(REFERENCE)
    bits = bloom_bits(members, fpr)
    words = np.random.default_rng(0).integers(0, 2**64, -(-bits // 64), dtype=np.uint64, endpoint=False)
    arrays = {k: np.array(v) for k, v in sections.items() if not k.startswith("filter.")}
    arrays["filter.0"] = words
    region = {"mode": "bloom", "section": "filter.0", "bits": bits, "hashes": bloom_hashes(bits, members),
              "members": members, "fpr_budget": fpr}
    write_artifact(path, {**header, "boundaries": [], "regions": [region]}, arrays)
    return path.stat().st_size


def measure(path: Path, root: Path | None) -> dict:
    env = dict(os.environ)
    if root is not None:
        env["PYTHONPATH"] = str(root)
    done = subprocess.run([sys.executable, "-c", PROBE, str(path)], capture_output=True, text=True, env=env, check=True)
    return json.loads(done.stdout)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--members", type=int, default=10_000_000)
    parser.add_argument("--fpr", type=float, default=0.01)
    parser.add_argument("--baseline-root", type=Path, help="a folder holding another `tamis` package to compare")
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as work:
        path = Path(work) / "scaled.tamis"
        size = write_scaled(path, args.members, args.fpr)
        print(f"artifact for {args.members:,} members at {args.fpr:g}: {size:,} bytes ({size * 8 / args.members:.2f} bits a member)")
        roots = {"this loader": None} | ({"baseline": args.baseline_root} if args.baseline_root else {})
        best = {}
        for name, root in roots.items():
            runs = [measure(path, root) for _ in range(args.repeat)]
            best[name] = {key: min(run[key] for run in runs) for key in runs[0]}
            row = best[name]
            print(f"{name:12s} open {row['open_s'] * 1000:8.1f} ms (+{row['open_rss'] / 2**20:6.1f} MiB)   "
                  f"first 100,000 keys {row['batch_s'] * 1000:8.1f} ms (+{row['batch_rss'] / 2**20:6.1f} MiB)   "
                  f"(best of {args.repeat})")
        if "baseline" in best:
            ours, base = best["this loader"], best["baseline"]
            print(f"ratio this / baseline: open time {ours['open_s'] / base['open_s']:.2f}, "
                  f"open + first batch time {(ours['open_s'] + ours['batch_s']) / (base['open_s'] + base['batch_s']):.2f}")


if __name__ == "__main__":
    main()
