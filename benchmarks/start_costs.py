"""Two start-up costs every `tamis` run may pay, each timed cold and warm in fresh processes.

    python benchmarks/start_costs.py ARTIFACT [--repeats N]

1. Prefect's temporary API server (what `tamis build` and `tamis demo` start when PREFECT_API_URL
   is unset), from a fresh process to its first healthy answer: on an empty PREFECT_HOME (Prefect
   creates its database) and on one an earlier start filled.
2. The compiled lookup path: opening ARTIFACT and answering 1,000 keys in a fresh process, with an
   empty numba cache (every kernel compiles) and with the cache an earlier run filled.

Each line pairs a cold and a warm run made one after the other, so the machine's load at that
moment weighs on both alike.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile

_SERVER = (
    "import time; started = time.perf_counter()\n"
    "from prefect.server.api.server import SubprocessASGIServer\n"
    "server = SubprocessASGIServer(); server.start()\n"
    "print(time.perf_counter() - started); server.stop()\n"
)
_LOOKUP = (
    "import sys, time; started = time.perf_counter()\n"
    "from tamis.loader import open_filter\n"
    "open_filter(sys.argv[1]).contains_many([b'handle_%d' % i for i in range(1000)])\n"
    "print(time.perf_counter() - started)\n"
)


def seconds(code: str, env: dict, *args: str) -> float:
    done = subprocess.run([sys.executable, "-c", code, *args], env={**os.environ, **env}, capture_output=True, text=True)
    if done.returncode != 0:
        sys.exit(done.stderr[-2000:])
    return float(done.stdout.split()[-1])


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("artifact")
    parser.add_argument("--repeats", type=int, default=2)
    args = parser.parse_args()
    quiet = {"PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "600", "PREFECT_SERVER_ANALYTICS_ENABLED": "false"}
    with tempfile.TemporaryDirectory(prefix="tamis-start-costs-") as scratch:
        warm_home, warm_cache = f"{scratch}/prefect-warm", f"{scratch}/numba-warm"
        seconds(_SERVER, {**quiet, "PREFECT_HOME": warm_home})
        seconds(_LOOKUP, {"NUMBA_CACHE_DIR": warm_cache}, args.artifact)
        for run in range(args.repeats):
            cold = seconds(_SERVER, {**quiet, "PREFECT_HOME": f"{scratch}/prefect-cold-{run}"})
            warm = seconds(_SERVER, {**quiet, "PREFECT_HOME": warm_home})
            print(f"Prefect temporary server: empty home {cold:6.1f} s, filled home {warm:6.1f} s ({cold / warm:.2f} x)")
        for run in range(args.repeats):
            cold = seconds(_LOOKUP, {"NUMBA_CACHE_DIR": f"{scratch}/numba-cold-{run}"}, args.artifact)
            warm = seconds(_LOOKUP, {"NUMBA_CACHE_DIR": warm_cache}, args.artifact)
            print(f"open + 1,000 lookups:     empty numba cache {cold:6.1f} s, filled {warm:6.1f} s ({cold / warm:.2f} x)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
