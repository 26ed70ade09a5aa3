"""The model stage on this machine against the same stage on a two-worker local Dask cluster.

Run: .venv/bin/python benchmarks/cluster_training.py [--members 50000] [--non-members 500000] [--repeat 3]

Builds an Emberfall demo corpus (pipeline.demo, seeded), featurizes it once (half the non-members
train, half validate), then trains the default model grid (tamis.model.ModelSettings) --repeat
times with `fit_model` (LightGBM, 2 threads) and with `fit_model_on_cluster` (LightGBM's Dask
interface, a LocalCluster of 2 worker processes of 1 thread each), alternating. It prints each
path's wall seconds (median, and its ratio to the local median of the same run), the totals it
priced, the capacity it chose, and whether every repeat gave the same forest. Needs the cluster
extra (pip install -e '.[cluster]').
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from distributed import Client, LocalCluster  # noqa: E402

from tamis.demo import generate_demo_corpus  # noqa: E402
from tamis.features import default_feature_spec, featurize  # noqa: E402
from tamis.config import ModelSettings  # noqa: E402
from tamis.model import fit_model, fit_model_on_cluster  # noqa: E402
from tamis.regions import RegionSettings, plan_regions  # noqa: E402

TARGET_FPR = 0.01


def filter_bytes(member_scores, val_scores, val_weights) -> float:
    """The build flow's price of the backup filters at the target."""
    return plan_regions(member_scores, val_scores, val_weights, TARGET_FPR, RegionSettings()).estimated_total_bits / 8


def matrices(members: int, non_members: int) -> dict:
    demo = generate_demo_corpus(members=members, non_members=non_members, seed=7)
    spec = default_feature_spec()
    others = [key.encode() for key in demo.nonmember_keys]
    counts = demo.nonmember_counts.astype(np.float64)
    return {
        "X_members": featurize([key.encode() for key in demo.member_keys], spec),
        "X_train_non": featurize(others[0::2], spec),
        "w_train_non": counts[0::2],
        "X_val_non": featurize(others[1::2], spec),
        "w_val_non": counts[1::2],
    }


def same_forest(first, second) -> bool:
    return first.forest.meta() == second.forest.meta() and all(
        np.array_equal(array, second.forest.sections()[name]) for name, array in first.forest.sections().items()
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--members", type=int, default=50_000)
    parser.add_argument("--non-members", type=int, default=500_000)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    X = matrices(args.members, args.non_members)
    settings = ModelSettings()
    runs: dict[str, list] = {"local, 2 threads": [], "cluster, 2 workers x 1 thread": []}
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster, Client(cluster) as client:
        paths = {
            "local, 2 threads": lambda: fit_model(**X, filter_bytes=filter_bytes, settings=settings),
            "cluster, 2 workers x 1 thread": lambda: fit_model_on_cluster(client, **X, filter_bytes=filter_bytes, settings=settings),
        }
        for _ in range(args.repeat):
            for name, fit in paths.items():
                started = time.perf_counter()
                choice = fit()
                runs[name].append((time.perf_counter() - started, choice))
    print(f"{args.members:,} members, {args.non_members:,} non-members (half train, half validation), {args.repeat} runs each")
    local = statistics.median(seconds for seconds, _ in runs["local, 2 threads"])
    for name, entries in runs.items():
        median = statistics.median(seconds for seconds, _ in entries)
        first = entries[0][1]
        print(
            f"{name:31s} median {median:6.1f} s ({median / local:.2f} x local), runs {[round(s, 1) for s, _ in entries]} s; "
            f"total {round(first.total_bytes):,} bytes, {first.params['leaves']} leaves at {first.params['learning_rate']}, "
            f"{first.trees} trees, AUC {first.auc:.4f}; same forest every run: {all(same_forest(first, c) for _, c in entries)}"
        )


if __name__ == "__main__":
    main()
