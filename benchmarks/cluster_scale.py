"""A build on a Dask cluster of local processes against the same build on this machine.

Run: .venv/bin/python benchmarks/cluster_scale.py [--members 200000] [--lookups 2000000] [--partitions 8]
                                                 [--workers 3] [--worker-memory 5GiB] [--no-local]

Starts a `dask scheduler` and --workers `dask worker` processes on 127.0.0.1 (tests/dask_processes.py:
no nanny, a memory limit each), then has the workers write the corpus partition by partition: the
Emberfall demo generator (tamis.demo, seeded per partition, Zipf-like lookup counts) makes
--members / --partitions members and --lookups / --partitions looked-up keys a partition, into one
folder of line files and one of Parquet files. It then runs `tamis build CONFIG --cluster ADDRESS`
(the demo defaults on those folders) in a fresh process, the driver, and prints wall seconds, the
peak resident memory of the driver and of every dask process (os.wait4), the keys the driver held
(the report's corpus.read), the artifact's bytes and its ratio against a plain Bloom filter at the
same target. Unless --no-local, the same corpus is then built on this machine alone (threads), and
the cluster's wall time and driver memory are printed as ratios to it.
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))  # tests/dask_processes.py

from dask_processes import dask_cluster  # noqa: E402
from scale import build, build_report, write_config  # noqa: E402

GIB = 2**30


def write_partition(index: int, folder: Path, members: int, lookups: int, seed: int) -> None:
    """On a worker: partition `index` of the corpus, from a generator seeded for it."""
    from tamis.demo import write_demo_corpus

    scratch = folder / f".scratch-{index}"
    members_path, lookups_path = write_demo_corpus(scratch, members=members, non_members=lookups, seed=seed + index)
    members_path.replace(folder / "members" / f"part-{index:04d}.txt")
    lookups_path.replace(folder / "lookups" / f"part-{index:04d}.parquet")
    shutil.rmtree(scratch)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--members", type=int, default=200_000)
    parser.add_argument("--lookups", type=int, default=2_000_000)
    parser.add_argument("--partitions", type=int, default=8)
    parser.add_argument("--workers", type=int, default=3)
    parser.add_argument("--worker-memory", default="5GiB")
    parser.add_argument("--no-local", action="store_true", help="skip the build on this machine alone")
    parser.add_argument("--keep", type=Path, help="keep the corpus and stores in this folder")
    args = parser.parse_args()
    from distributed import Client

    with tempfile.TemporaryDirectory(prefix="tamis-cluster-scale-") as temporary:
        root = args.keep or Path(temporary)
        for name in ("members", "lookups"):
            (root / name).mkdir(parents=True, exist_ok=True)
        with dask_cluster(root / "dask", workers=args.workers, memory_limit=args.worker_memory) as started:
            began = time.perf_counter()
            with Client(started.address) as client:
                client.gather(client.map(write_partition, range(args.partitions), folder=root, pure=False,
                                         members=args.members // args.partitions,
                                         lookups=args.lookups // args.partitions, seed=7))
            print(f"# {args.partitions} partitions written by the workers in {time.perf_counter() - began:.0f} s", file=sys.stderr)
            config, store = write_config(root, root / "members", root / "lookups", None)
            seconds, driver_peak = build(config, "--cluster", started.address)
        report = build_report(store)
        read = report["corpus"]["read"]
        print(f"cluster: {args.workers} workers x {args.worker_memory}, {args.partitions} partitions, "
              f"{report['corpus']['members']:,} members, {report['corpus']['non_members']:,} distinct non-members")
        print(f"  wall {seconds:.0f} s, gate {'passed' if report['gate']['passed'] else 'refused'}, "
              f"false negatives {report['false_negatives']}")
        print(f"  driver peak {driver_peak / GIB:.2f} GiB, holding {read['driver_keys']:,} keys ({read['driver_key_bytes'] / 2**20:.0f} MiB of key bytes)")
        for name, peak in started.peak_rss.items():
            print(f"  {name} peak {peak / GIB:.2f} GiB")
        print(f"  artifact {report['size']['total_bytes']:,} bytes, ratio to a plain Bloom filter {report['baseline']['ratio']:.3f}")
        print(f"  stage seconds {report['timings']}")
        if args.no_local:
            return
        (root / "local").mkdir()
        local_config, local_store = write_config(root / "local", root / "members", root / "lookups", None)
        local_seconds, local_peak = build(local_config)
        local = build_report(local_store)
        print(f"local: wall {local_seconds:.0f} s, peak {local_peak / GIB:.2f} GiB, artifact {local['size']['total_bytes']:,} bytes, "
              f"ratio to a plain Bloom filter {local['baseline']['ratio']:.3f}")
        print(f"  stage seconds {local['timings']}")
        print(f"cluster / local: wall {seconds / local_seconds:.2f} x, driver memory {driver_peak / local_peak:.2f} x")


if __name__ == "__main__":
    main()
