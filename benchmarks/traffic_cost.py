"""What recording its traffic costs a served filter: lookup throughput with and without a lookup
sample, and the bytes the sample files take per million lookups.

Run: .venv/bin/python benchmarks/traffic_cost.py --artifact tamis-demo/store/1/artifact.tamis
                                                 [--keys 300000] [--singles 20000] [--repeat 5]
                                                 [--rates 0.000244140625,0.01]

A store of its own holds the artifact as version 1 and is opened three ways, as a service opens it:
without recording, and with `sample_folder` at each --rates (the first is the default rate,
1/4096). The looked-up keys are Zipf-like: --keys lookups drawn from 100,000 random handles with
P(rank k) proportional to k^-1.1. In one run, interleaved (each repeat times every way in turn), it
prints for the default answer path:

- batch `contains_many` throughput, keys/s of CPU time (best of --repeat), and its ratio against
  not recording;
- single `contains`, CPU microseconds a key over --singles calls (best of --repeat), and the
  difference against not recording;
- the bytes of the sample files written on close, per million lookups answered.
"""

from __future__ import annotations

import argparse
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np

from tamis import publish
from tamis.loader import open_filter
from tamis.traffic import DEFAULT_SAMPLE_RATE, sample_files

ALPHABET = np.array(list("abcdefghijklmnopqrstuvwxyz0123456789_"))


def handles(rng: np.random.Generator, count: int) -> list[str]:
    lengths = rng.integers(8, 17, count)
    text = "".join(ALPHABET[rng.integers(0, len(ALPHABET), int(lengths.sum()))].tolist())
    ends = np.cumsum(lengths).tolist()
    return [text[end - n : end] for end, n in zip(ends, lengths.tolist())]


def zipf_lookups(rng: np.random.Generator, population: list[str], count: int) -> list[str]:
    weights = 1.0 / np.arange(1, len(population) + 1) ** 1.1
    return [population[i] for i in rng.choice(len(population), count, p=weights / weights.sum())]


def cpu_seconds(run) -> float:
    started = time.process_time()
    run()
    return time.process_time() - started


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--artifact", required=True, type=Path)
    parser.add_argument("--keys", type=int, default=300_000)
    parser.add_argument("--singles", type=int, default=20_000)
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--rates", default=f"{DEFAULT_SAMPLE_RATE},0.01")
    args = parser.parse_args()
    rates = [float(r) for r in args.rates.split(",")]
    rng = np.random.default_rng(7)
    lookups = zipf_lookups(rng, handles(rng, 100_000), args.keys)
    singles = lookups[: args.singles]
    with tempfile.TemporaryDirectory() as root:
        root = Path(root)
        store = root / "store"
        (store / "1").mkdir(parents=True)
        shutil.copyfile(args.artifact, store / "1" / publish.ARTIFACT_NAME)
        (store / publish.POINTER_NAME).write_text("1\n")
        ways = {"not recording": None, **{f"sample rate {r:.6g}": r for r in rates}}
        folders = {name: root / f"sample-{i}" for i, name in enumerate(ways)}
        opened = {}
        for name, rate in ways.items():
            if rate is None:
                opened[name] = open_filter(store)
            else:
                folders[name].mkdir()
                opened[name] = open_filter(store, sample_folder=folders[name], sample_rate=rate)
        answered = dict.fromkeys(ways, 0)
        batch, single = {name: [] for name in ways}, {name: [] for name in ways}
        for _ in range(args.repeat):
            for name, served in opened.items():
                batch[name].append(cpu_seconds(lambda: served.contains_many(lookups)))
                single[name].append(cpu_seconds(lambda: [served.contains(k) for k in singles]))
                answered[name] += len(lookups) + len(singles)
        for served in opened.values():
            served.close()
        base_batch = len(lookups) / min(batch["not recording"])
        base_single = min(single["not recording"]) / len(singles) * 1e6
        print(f"answer path: {opened['not recording']._served.filter.answer_path}; {len(lookups):,} Zipf-like lookups a batch")
        print(f"{'way':<28} {'batch keys/s':>14} {'ratio':>7} {'single us/key':>14} {'+us':>6} {'file bytes / 1M lookups':>24}")
        for name in ways:
            throughput = len(lookups) / min(batch[name])
            micro = min(single[name]) / len(singles) * 1e6
            written = sum(p.stat().st_size for p in sample_files(folders[name])) if ways[name] is not None else 0
            print(f"{name:<28} {throughput:>14,.0f} {throughput / base_batch:>7.3f} {micro:>14.2f} {micro - base_single:>+6.2f} "
                  f"{written / answered[name] * 1e6:>24,.0f}")


if __name__ == "__main__":
    main()
