"""What the demo's run time depends on: `tamis demo` timed under four conditions, in one run.

    python benchmarks/demo_conditions.py [--members N] [--non-members N]

1. warm: a Prefect home and a numba cache that earlier runs filled (the first, untimed run fills them);
2. fresh Prefect home: PREFECT_HOME points at an empty folder, so Prefect creates its database
   while its temporary API server starts;
3. fresh numba cache: NUMBA_CACHE_DIR points at an empty folder, so every compiled kernel is
   compiled again;
4. one core: the demo's process (and every thread and child of it) is pinned to one CPU.

Each line gives the wall-clock seconds of the whole command and the ratio to the warm run of the same
invocation. The machine's other load shows in every figure: run it on a quiet machine.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def timed_demo(folder: Path, args, env: dict, cores: set[int] | None = None) -> float:
    command = [sys.executable, "-m", "tamis.cli", "demo", "--dir", str(folder),
               "--members", str(args.members), "--non-members", str(args.non_members)]
    started = time.perf_counter()
    done = subprocess.run(command, env=env, capture_output=True, text=True,
                          preexec_fn=(lambda: os.sched_setaffinity(0, cores)) if cores else None)
    seconds = time.perf_counter() - started
    if done.returncode != 0:
        sys.exit(f"the demo failed ({done.returncode}):\n{done.stderr[-2000:]}")
    return seconds


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--members", type=int, default=200_000)
    parser.add_argument("--non-members", type=int, default=2_000_000)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="tamis-demo-conditions-") as scratch:
        root = Path(scratch)
        base = {**os.environ, "PREFECT_HOME": str(root / "prefect-warm"), "NUMBA_CACHE_DIR": str(root / "numba-warm")}
        timed_demo(root / "warm-up", args, base)  # fills the Prefect home and the numba cache
        conditions = [
            ("warm (Prefect home and numba cache filled)", base, None),
            ("fresh Prefect home", {**base, "PREFECT_HOME": str(root / "prefect-fresh")}, None),
            ("fresh numba cache", {**base, "NUMBA_CACHE_DIR": str(root / "numba-fresh")}, None),
            ("one core", base, {min(os.sched_getaffinity(0))}),
        ]
        print(f"tamis demo, {args.members:,} members, {args.non_members:,} non-members, "
              f"{len(os.sched_getaffinity(0))} cores available")
        warm = None
        for number, (name, env, cores) in enumerate(conditions):
            seconds = timed_demo(root / f"run-{number}", args, env, cores)
            warm = warm or seconds
            print(f"  {name:<45} {seconds:6.1f} s  {seconds / warm:5.2f} x warm")
    return 0


if __name__ == "__main__":
    sys.exit(main())
