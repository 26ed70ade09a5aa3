"""Build time and peak memory against corpus size, through `tamis build` as a nightly run calls it.

Run: .venv/bin/python benchmarks/scale.py [--sizes 100000:900000,300000:2700000,1000000:9000000]
                                          [--train-samples 100000,300000,1000000] [--keep DIR]

For each MEMBERS:NON_MEMBERS size it writes the Emberfall demo corpus (pipeline.demo, seeded;
non-members with lookup counts) into a temporary folder, then runs `tamis build` on a config of the
demo defaults in a fresh process, and prints the build's wall time, the seconds of every stage (from
the report), its peak resident memory (the child's maximum resident set, from os.wait4) and the
artifact's size. With --train-samples it then rebuilds the largest size once per
[model] train_nonmembers value and prints what each training sample costs in time and bytes.

Corpus generation is timed on its own and is not part of the build figures. The build runs with
the store on the same disk as the corpus, on this machine's task runner (threads).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from tamis.flows.build import STAGES  # noqa: E402
from tamis.demo import write_demo_corpus  # noqa: E402

TAMIS = [str(Path(sys.executable).with_name("tamis"))]
GIB = 2**30


@dataclass(frozen=True)
class Run:
    members: int
    non_members: int
    train_sample: int | None
    wall_seconds: float
    peak_bytes: int
    report: dict


def write_config(folder: Path, members: Path, lookups: Path, train_sample: int | None) -> tuple[Path, Path]:
    """The demo defaults (pipeline's embedded configs/demo.toml) with this corpus and a fresh store:
    the config's path and the store's."""
    demo = (Path(__file__).resolve().parents[1] / "configs" / "demo.toml").read_text()
    model = f"\n[model]\ntrain_nonmembers = {train_sample}\n" if train_sample else ""
    store = folder / f"store-{train_sample or 'default'}"
    config = folder / f"build-{train_sample or 'default'}.toml"
    config.write_text(
        demo.replace("[corpus]\n", f'[corpus]\nmembers = "{members}"\nnon_members = "{lookups}"\n', 1)
        .replace("[store]\n", f'[store]\npath = "{store}"\n', 1)
        + model
    )
    return config, store


def build(config: Path, *options: str) -> tuple[float, int]:
    """Wall seconds and peak resident bytes of one `tamis build CONFIG [OPTIONS]` in a fresh process."""
    env = {**os.environ, "PREFECT_LOGGING_LEVEL": "WARNING", "PREFECT_SERVER_ANALYTICS_ENABLED": "false"}
    started = time.perf_counter()
    child = subprocess.Popen([*TAMIS, "build", str(config), *options], env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(child.pid, 0)
    seconds = time.perf_counter() - started
    out, err = child.stdout.read().decode(), child.stderr.read().decode()
    if os.waitstatus_to_exitcode(status) not in (0, 1):  # 1: refused by the gate, still measured
        raise SystemExit(f"tamis build {config} failed:\n{out}{err}")
    return seconds, usage.ru_maxrss * 1024  # ru_maxrss is in KiB on Linux


def build_report(store: Path) -> dict:
    """The report of the one build in a fresh store: the published version's, or the refused one's."""
    (report,) = [*store.glob("[0-9]*/report.json"), *store.glob("refused/*/report.json")]
    return json.loads(report.read_text())


def measure(folder: Path, members: int, non_members: int, train_samples: list[int | None]) -> list[Run]:
    started = time.perf_counter()
    members_path, lookups_path = write_demo_corpus(folder, members, non_members)
    print(f"# corpus {members:,} + {non_members:,} written in {time.perf_counter() - started:.0f} s", file=sys.stderr)
    runs = []
    for sample in train_samples:
        config, store = write_config(folder, members_path, lookups_path, sample)
        seconds, peak = build(config)
        report = build_report(store)
        runs.append(Run(members, non_members, sample, seconds, peak, report))
        print(f"# built {members:,} + {non_members:,} (train sample {sample or 'default'}) in {seconds:.0f} s", file=sys.stderr)
    return runs


def print_table(runs: list[Run]) -> None:
    stages = [stage for stage in STAGES if stage in runs[0].report["timings"]]
    header = ["keys", "members", "train", "wall s", *stages, "peak GiB", "bytes", "ratio", "aim", "held-out FPR (upper)", "gate"]
    print("| " + " | ".join(header) + " |")
    print("|" + "---|" * len(header))
    for run in runs:
        report = run.report
        cells = [
            f"{(run.members + run.non_members) / 1e6:g}M",
            f"{run.members:,}",
            f"{report['model']['params']['train_nonmembers']:,}",
            f"{run.wall_seconds:.0f}",
            *(f"{report['timings'][stage]:.1f}" for stage in stages),
            f"{run.peak_bytes / GIB:.2f}",
            f"{report['size']['total_bytes']:,}",
            f"{report['baseline']['ratio']:.3f}",
            f"{report['aim_fpr']:.3%}",
            f"{report['heldout']['fpr']:.3%} ({report['heldout']['fpr_upper']:.3%})",
            "passed" if report["gate"]["passed"] else "refused",
        ]
        print("| " + " | ".join(cells) + " |")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default="100000:900000,300000:2700000,1000000:9000000", help="MEMBERS:NON_MEMBERS,...")
    parser.add_argument("--train-samples", default="", help="train_nonmembers values to rebuild the largest size with")
    parser.add_argument("--keep", type=Path, help="keep the corpora and stores in this folder")
    args = parser.parse_args()
    sizes = [tuple(int(v) for v in size.split(":")) for size in args.sizes.split(",")]
    samples = [int(v) for v in args.train_samples.split(",") if v]
    with tempfile.TemporaryDirectory(prefix="tamis-scale-") as temporary:
        root = args.keep or Path(temporary)
        runs = []
        for index, (members, non_members) in enumerate(sizes):
            last = index == len(sizes) - 1
            folder = root / f"{members}-{non_members}"
            runs += measure(folder, members, non_members, [None] + (samples if last else []))
        print_table(runs)


if __name__ == "__main__":
    main()
