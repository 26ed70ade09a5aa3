"""The README's table of the demo, regenerated: one `tamis demo` run, every figure read from its report.

    python benchmarks/readme_figures.py [--dir DIR] [--members N] [--non-members N]

Runs `tamis demo` into DIR (a temporary folder unless given) in a fresh process and prints the
README's "The demo" table as Markdown, headed by the date, the machine's load and the command, so
the README's demo figures all come from one build: its artifact's bytes and their parts, the plain
filters it is compared with, the measured rate and its bound by stratum, the false negatives, the
build's wall time, the verify stage's share of it, and the build process's peak resident memory.
"""

from __future__ import annotations

import argparse
import datetime
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def demo_table(report: dict, seconds: float, peak_bytes: int) -> list[str]:
    size, base, held, strata = report["size"], report["baseline"], report["heldout"], report["strata"]
    timings = report["timings"]
    layout = size["total_bytes"] - size["model_bytes"] - size["filter_bytes"]
    return [
        "| figure | value |",
        "|---|---|",
        f"| artifact | {size['total_bytes']:,} bytes: model {size['model_bytes']:,}, filters {size['filter_bytes']:,}, "
        f"header and layout {layout:,} |",
        f"| against plain filters at the target | Bloom filter {base['bloom_bytes']:,} bytes (ratio {base['ratio']:.3f}); "
        f"best plain static filter ({base['static_kind']}) {base['static_bytes']:,} bytes (ratio {base['static_ratio']:.3f}) |",
        f"| FPR (by lookups) | {held['fpr']:.3%}, {held['confidence']:.0%} upper bound {held['fpr_upper']:.3%} "
        f"(target {report['target_fpr']:.0%}, aim {report['aim_fpr']:.3%}) |",
        f"| heavy keys ({strata['tau']} lookups or more) | {strata['heavy_keys']:,} keys, {strata['heavy_share']:.1%} of "
        f"lookups; their false positives {strata['heavy_false_positive_share']:.3%} of lookups |",
        f"| tail (held-out light keys) | {strata['tail_heldout_keys']:,} keys, rate {strata['tail_fpr']:.3%}, "
        f"{strata['confidence']:.0%} upper bound {strata['tail_fpr_upper']:.3%} |",
        f"| false negatives | {report['false_negatives']} of {report['corpus']['members']:,}, through "
        f"{', '.join(report['answer_paths']['paths'])} |",
        f"| build time | {seconds:.0f} s end to end (model {timings['model']:.0f} s, verify {timings['verify']:.1f} s: "
        f"{timings['verify'] / timings['total']:.1%} of the build), peak memory {peak_bytes / 2**30:.1f} GiB |",
    ]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--dir", type=Path, help="the demo's folder (default: a temporary one)")
    parser.add_argument("--members", type=int, default=200_000)
    parser.add_argument("--non-members", type=int, default=2_000_000)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as work:
        folder = (args.dir or Path(work) / "demo").resolve()
        command = ["tamis", "demo", "--dir", str(folder), "--members", str(args.members),
                   "--non-members", str(args.non_members)]
        load = os.getloadavg()[0]
        started = time.perf_counter()
        done = subprocess.run([sys.executable, "-m", "tamis.cli", *command[1:]], capture_output=True, text=True)
        seconds = time.perf_counter() - started
        if done.returncode != 0:
            sys.exit(f"the demo failed ({done.returncode}):\n{done.stderr[-2000:]}")
        peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024  # Linux: KiB
        report = json.loads((folder / "store" / "1" / "report.json").read_text())
    print(f"**The demo** (`{' '.join(command)}`, {datetime.date.today().isoformat()}, load average "
          f"{load:.1f} at the start, {os.cpu_count()} cores; `python benchmarks/readme_figures.py`):")
    print()
    print("\n".join(demo_table(report, seconds, peak)))
    return 0


if __name__ == "__main__":
    sys.exit(main())
