"""The verify stage's share of the demo build, and what each answer path costs it.

    python benchmarks/verify_share.py [--dir DIR] [--members N] [--non-members N]

Runs `tamis demo` into DIR (a temporary folder unless given) in a fresh process and prints every
stage's seconds from the build's report.json, with the verify stage's share of the whole build
(the aim: at most a quarter). Then it opens the published artifact and times each answer path of
the loader (`tamis.loader.answer_paths`: each query path's batch and single-key call) over every
member, as the verify stage answers them, in microseconds a key: where verification's time goes.
Run it on a quiet machine: the other load shows in every figure.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--dir", type=Path, help="the demo's folder (default: a temporary one)")
    parser.add_argument("--members", type=int, default=200_000)
    parser.add_argument("--non-members", type=int, default=2_000_000)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as work:
        folder = (args.dir or Path(work) / "demo").resolve()
        command = [sys.executable, "-m", "tamis.cli", "demo", "--dir", str(folder),
                   "--members", str(args.members), "--non-members", str(args.non_members)]
        done = subprocess.run(command, capture_output=True, text=True)
        if done.returncode != 0:
            sys.exit(f"the demo failed ({done.returncode}):\n{done.stderr[-2000:]}")
        version = folder / "store" / "1"
        timings = json.loads((version / "report.json").read_text())["timings"]
        total = timings.pop("total")
        print(f"tamis demo --members {args.members} --non-members {args.non_members}: {total:.1f} s")
        for stage, seconds in sorted(timings.items(), key=lambda item: -item[1]):
            print(f"  {stage:10s} {seconds:7.2f} s  {seconds / total:6.1%}")
        print(f"verify's share of the build: {timings['verify'] / total:.1%} (aim: at most 25%)")

        from tamis.loader import answer_paths, open_filter

        members = (folder / "banned_handles.txt").read_bytes().splitlines()
        opened = open_filter(version / "artifact.tamis")
        print(f"every member ({len(members):,}) through each answer path:")
        for path in answer_paths():
            started = time.perf_counter()
            answers = opened.answers_through(path, members)
            seconds = time.perf_counter() - started
            print(f"  {path:16s} {seconds:6.2f} s  {seconds / len(members) * 1e6:6.2f} us a key  all maybe: {bool(answers.all())}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
