"""The verify stage's share of the demo build, and what each answer path costs it.

    python benchmarks/verify_share.py [--dir DIR] [--members N] [--non-members N]

Runs `tamis demo` into DIR (a temporary folder unless given) in a fresh process and prints every
stage's seconds from the build's report.json, with the verify stage's share of the whole build
(the aim: at most a quarter). Then it opens the published artifact and times each answer path of
the loader (`tamis.loader.answer_paths`: each query path's batch and single-key call) over every
member, as the verify stage answers them, in microseconds a key (best of 3, in a fresh process):
where verification's time goes. With --baseline-root DIR (a folder holding another `tamis` package,
e.g. the code before a change) the paths are timed for it too, in turn, with the ratio.
Run it on a quiet machine: the other load shows in every figure.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path


# Seconds of each answer path over every member (argv: artifact, member file), best of 3.
PROBE = r"""
import json, sys, time
from tamis.loader import answer_paths, open_filter
members = open(sys.argv[2], "rb").read().splitlines()
opened = open_filter(sys.argv[1])
seconds = {}
for path in answer_paths():
    runs = []
    for _ in range(3):
        started = time.perf_counter()
        assert opened.answers_through(path, members).all()
        runs.append(time.perf_counter() - started)
    seconds[path] = min(runs)
print(json.dumps(seconds))
"""


def path_seconds(artifact: Path, members: Path, root: Path | None) -> dict[str, float]:
    env = dict(os.environ, **({"PYTHONPATH": str(root)} if root else {}))
    done = subprocess.run([sys.executable, "-c", PROBE, str(artifact), str(members)], capture_output=True, text=True,
                          env=env, check=True)
    return json.loads(done.stdout)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--dir", type=Path, help="the demo's folder (default: a temporary one)")
    parser.add_argument("--members", type=int, default=200_000)
    parser.add_argument("--non-members", type=int, default=2_000_000)
    parser.add_argument("--baseline-root", type=Path, help="a folder holding another `tamis` package to compare")
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

        members = folder / "banned_handles.txt"
        count = len(members.read_bytes().splitlines())
        ours = path_seconds(version / "artifact.tamis", members, None)
        base = path_seconds(version / "artifact.tamis", members, args.baseline_root) if args.baseline_root else None
        print(f"every member ({count:,}) through each answer path (best of 3):")
        for path, seconds in ours.items():
            line = f"  {path:16s} {seconds:6.2f} s  {seconds / count * 1e6:6.2f} us a key"
            if base and path in base:
                line += f"   baseline {base[path] / count * 1e6:6.2f} us a key, ratio {seconds / base[path]:.2f}"
            print(line)
    return 0


if __name__ == "__main__":
    sys.exit(main())
