"""What pending additions cost a service's lookups: 0, 10,000 and 100,000 keys added after the
version in service was built, served on top of it (`tamis add`, `tamis.additions.PendingKeys`).

Run: .venv/bin/python benchmarks/additions_cost.py --artifact tamis-demo/store/1/artifact.tamis
                                                   [--keys 300000] [--singles 20000] [--repeat 5]
                                                   [--pending 0,10000,100000]

For each pending count, a store of its own holds the artifact as version 1 and that many added keys
(random handles, one batch of them), opened with `open_filter(store)` as a service opens it. The
looked-up keys are --keys random handles (as str), 1% of them among the added ones. In one run,
interleaved (each repeat times every count in turn), it prints for the numpy path and, when numba
is installed, the compiled path:

- batch `contains_many` throughput, keys/s of CPU time (best of --repeat), and its ratio against
  no pending additions;
- single `contains`, CPU microseconds a key over --singles calls (best of --repeat), and the
  difference against no pending additions (a single key costs one set probe more).

It also checks that every count answers the same as the artifact alone, but for the added keys.
"""

from __future__ import annotations

import argparse
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np

from tamis import additions, publish
from tamis.loader import open_filter
from tamis.query import available_paths

ALPHABET = np.array(list("abcdefghijklmnopqrstuvwxyz0123456789_"))


def handles(rng: np.random.Generator, count: int, prefix: str) -> list[str]:
    """`count` distinct random handle-like keys of 8 to 16 characters."""
    lengths = rng.integers(8, 17, count)
    letters = ALPHABET[rng.integers(0, len(ALPHABET), int(lengths.sum()))]
    text = "".join(letters.tolist())
    ends = np.cumsum(lengths).tolist()
    return list(dict.fromkeys(f"{prefix}{text[end - n:end]}" for end, n in zip(ends, lengths.tolist())))


def store_with(root: Path, artifact: Path, added: list[str]) -> Path:
    store = root / f"pending-{len(added)}"
    (store / "1").mkdir(parents=True)
    shutil.copyfile(artifact, store / "1" / publish.ARTIFACT_NAME)
    (store / publish.POINTER_NAME).write_text("1\n")
    if added:
        additions.add_keys(store, added)
    return store


def cpu_seconds(run) -> float:
    started = time.process_time()
    run()
    return time.process_time() - started


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--artifact", required=True, type=Path, help="the artifact to serve (e.g. the demo's)")
    parser.add_argument("--keys", type=int, default=300_000)
    parser.add_argument("--singles", type=int, default=20_000)
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--pending", default="0,10000,100000")
    args = parser.parse_args()
    counts = [int(c) for c in args.pending.split(",")]
    rng = np.random.default_rng(2026)
    pool = handles(rng, max(counts) + max(counts) // 50 + 10, "ban_")
    looked = handles(rng, args.keys, "")
    with tempfile.TemporaryDirectory(prefix="tamis-additions-cost-") as folder:
        stores = {}
        for count in counts:
            added = pool[:count]
            keys = looked[: args.keys - len(added[: args.keys // 100])] + added[: args.keys // 100]
            stores[count] = (store_with(Path(folder), args.artifact, added), keys, set(added))
        print(f"artifact {args.artifact}; {args.keys:,} looked-up str keys, 1% of them added; CPU time, best of {args.repeat}")
        print(f"{'path':<9} {'pending':>8} {'batch keys/s':>13} {'vs none':>8} {'single us':>10} {'vs none':>9}")
        plain = open_filter(args.artifact, answer_path="numpy")
        for path in available_paths():
            served = {count: open_filter(store, answer_path=path) for count, (store, _, _) in stores.items()}
            for count, (_, keys, added) in stores.items():
                expected = plain.contains_many(keys) | np.array([k in added for k in keys])
                assert (served[count].contains_many(keys) == expected).all(), f"{path}, {count} pending: wrong answers"
            batch = {count: [] for count in counts}
            single = {count: [] for count in counts}
            for _ in range(args.repeat):
                for count, (_, keys, _) in stores.items():
                    filter_ = served[count]
                    batch[count].append(cpu_seconds(lambda: filter_.contains_many(keys)))
                    singles = keys[: args.singles]
                    single[count].append(cpu_seconds(lambda: [filter_.contains(k) for k in singles]))
            none_rate = len(stores[counts[0]][1]) / min(batch[counts[0]])
            none_single = min(single[counts[0]]) / args.singles * 1e6
            for count in counts:
                rate = len(stores[count][1]) / min(batch[count])
                us = min(single[count]) / args.singles * 1e6
                print(f"{path:<9} {count:>8,} {rate:>13,.0f} {rate / none_rate:>8.3f} {us:>10.2f} {us - none_single:>+8.2f}")
            for filter_ in served.values():
                filter_.close()


if __name__ == "__main__":
    main()
