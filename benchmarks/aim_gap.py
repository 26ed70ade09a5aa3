"""Where the rate a plan was made for and the rate the held-out keys measure part ways.

Run: .venv/bin/python benchmarks/aim_gap.py [--members 100000] [--non-members 900000] [--seeds 3]
         [--target 0.01]

Builds the Emberfall demo corpus without its lookup counts (every key one lookup) through the build flow's
own stage functions in this process, once per split seed, and splits the gap between the plan's
rate and the measured one into its parts, each estimated on keys that took no part in the choice
it judges:

    planned    sum_i H_i f_i: the plan's rate, on the validation shares H it was fitted to
    fit        sum_i H'_i f_i - planned: the same budgets on the held-out keys' shares H'
               (the plan's boundaries and budgets were chosen on the validation keys, so their
               shares there flatter them)
    bloom      sum_i H'_i (r_i - f_i): each region's real rate r_i = (share of bits set)^k of its
               written bit array (Bloom 1970, standard analysis) against the budget it was sized for
    luck       measured - sum_i H'_i r_i: the held-out answers against their expectation (noise)

Every figure is by distinct keys; the last line gives each part's mean over the seeds with its
standard error.
"""

from __future__ import annotations

import argparse
import math
import sys
import tempfile
from importlib import resources
from pathlib import Path

import numpy as np
import polars as pl

from tamis import verify
from tamis.config import load_config, with_overrides
from tamis.demo import write_demo_corpus
from tamis.features import default_feature_spec, featurize
from tamis.flows.build import extract_features, read_corpus, run_in_process, score_plan_keys, settle, train_model
from tamis.planning import training_keys
from tamis.regions import region_of
from tamis.trees import score_batch

DEMO_CONFIG = resources.files("tamis.configs") / "demo.toml"
PARTS = ("planned", "fit", "bloom", "luck", "measured")


def quiet(*_) -> None:
    """A stage's progress reporter that says nothing."""


def real_rates(filters) -> np.ndarray:
    """Each region's rate as written: (share of bits set)^k for Bloom, 1 for "yes", 0 for "no"."""
    rates = []
    for region in filters:
        if region.mode == "bloom":
            ones = int(np.unpackbits(region.words.view(np.uint8)).sum())
            rates.append((ones / region.bits) ** region.hashes)
        else:
            rates.append(1.0 if region.mode == "yes" else 0.0)
    return np.array(rates)


def one_build(members: Path, non_members: Path, split_seed: int, target: float) -> dict[str, float]:
    config = with_overrides(
        load_config(Path(str(DEMO_CONFIG))),
        corpus={"members": members, "non_members": non_members, "split_seed": split_seed},
        target={"fpr": target},
    )
    corpus = read_corpus.fn(config)
    strata = verify.strata_of(corpus)
    aim = verify.aim_fpr(target, strata, corpus.check.counts, config.gate.confidence, config.gate.aim_sigmas, config.filters.variants)
    spec = default_feature_spec()
    train = training_keys(corpus, config)
    X = extract_features(run_in_process, corpus, train, spec, config)
    choice = train_model.fn(corpus, train, X, aim, config, quiet)
    settled = settle(run_in_process, corpus, score_plan_keys(run_in_process, corpus, X, choice.forest, config), aim, config)
    plan, filters = settled.plan, settled.filters  # no heavy keys: nothing to spare

    heldout_scores = score_batch(choice.forest, featurize(corpus.heldout.keys, spec))
    regions = region_of(heldout_scores, plan.boundaries)
    weights = corpus.heldout.counts.astype(np.float64)
    shares = np.bincount(regions, weights=weights, minlength=len(plan.fprs)) / weights.sum()
    rates = real_rates(filters)
    answers = np.zeros(len(regions), dtype=bool)
    for index, region in enumerate(filters):
        mask = regions == index
        if region.mode == "yes":
            answers[mask] = True
        elif region.mode == "bloom" and mask.any():
            answers[mask] = region.bloom(config.filters.hash_seed).query([corpus.heldout.keys[i] for i in np.flatnonzero(mask)])
    measured = float(weights[answers].sum() / weights.sum())
    budgets = np.asarray(plan.fprs)
    planned = float(plan.expected_fpr)
    on_heldout = float(shares @ budgets)
    expected = float(shares @ rates)
    row = {"aim": aim, "planned": planned, "fit": on_heldout - planned, "bloom": expected - on_heldout,
           "luck": measured - expected, "measured": measured}
    print(
        f"seed {split_seed}: aim {aim:.4%}  planned {planned:.4%}  + fit {row['fit']:+.4%}  + bloom {row['bloom']:+.4%}  "
        f"+ luck {row['luck']:+.4%}  = measured {measured:.4%}  ({len(corpus.heldout.keys):,} held-out keys, "
        f"{plan.regions} regions)",
        flush=True,
    )
    return row


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--members", type=int, default=100_000)
    parser.add_argument("--non-members", type=int, default=900_000)
    parser.add_argument("--seeds", type=int, default=3)
    parser.add_argument("--target", type=float, default=0.01)
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="tamis-aim-gap-") as scratch:
        members, lookups = write_demo_corpus(Path(scratch), members=args.members, non_members=args.non_members)
        keys_only = Path(scratch) / "keys.parquet"
        pl.read_parquet(lookups).select("key").write_parquet(keys_only)
        rows = [one_build(members, keys_only, 1000 + seed, args.target) for seed in range(args.seeds)]
    summary = []
    for part in PARTS:
        values = np.array([row[part] for row in rows])
        error = values.std(ddof=1) / math.sqrt(len(values)) if len(values) > 1 else float("nan")
        summary.append(f"{part} {values.mean():+.4%} (se {error:.4%})")
    print(f"mean over {len(rows)} seeds: " + ", ".join(summary))


if __name__ == "__main__":
    sys.exit(main())
