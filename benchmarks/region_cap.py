"""What capping every region's rate costs: the demo artifact at 1% with [regions] max_region_fpr at
1 (no cap), 0.5, 0.1 and 0.05, the same model for all.

Run: .venv/bin/python benchmarks/region_cap.py [--quick] [--target 0.01] [--caps 1,0.5,0.1,0.05]

A region whose budget is 1 answers "maybe" to every key that scores there without asking a filter;
keys unlike the validation sample that score like members then pass at that region's rate. The cap
gives every region with members a filter at a rate of at most the cap, which bounds that worst case
and costs bytes. The model is trained once (as the build does, at the aim, uncapped) and every cap
gets its own region plan, filters and artifact, verified through the loader like a build
(`benchmarks/compare_filters.py` supplies the stages). Printed per cap: the regions' budgets and
kinds, the artifact's bytes and their ratio to the uncapped one, the held-out rate.
"""

from __future__ import annotations

import argparse
import dataclasses
import tempfile
from pathlib import Path

from compare_filters import QUICK_DEMO, QUICK_MODEL, build_artifact, log, prepare, quiet, through_loader
from tamis import verify
from tamis.config import with_overrides
from tamis.flows.build import choose_regions, run_in_process, train_model
from tamis.trees import score_batch


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help=f"a {QUICK_DEMO[0]:,}-member demo and one small model candidate")
    parser.add_argument("--target", type=float, default=0.01)
    parser.add_argument("--caps", default="1,0.5,0.1,0.05", help="comma-separated caps (1: none)")
    args = parser.parse_args()
    caps = [float(cap) for cap in args.caps.split(",")]
    size = QUICK_DEMO if args.quick else (200_000, 2_000_000)
    with tempfile.TemporaryDirectory(prefix="tamis-cap-") as scratch:
        prepared = prepare("demo", Path(scratch) / "demo", size, QUICK_MODEL if args.quick else {}, {})
        corpus = prepared.corpus
        config = with_overrides(prepared.config, target={"fpr": args.target})
        sample = verify.require_heldout(corpus.heldout, corpus.has_counts, args.target, config.gate, config.corpus.heldout_share)
        aim = verify.aim_fpr(args.target, sample, verify.heldout_sample(corpus.validation, corpus.has_counts),
                             config.gate.confidence, config.gate.aim_sigmas)
        choice = train_model.fn(corpus, prepared.train, prepared.features, aim, config, quiet)
        heldout_scores = score_batch(choice.forest, prepared.heldout_features)
        rows = []
        for cap in caps:
            capped = with_overrides(config, regions={"max_region_fpr": cap})
            plan, scores = choose_regions(run_in_process, corpus, prepared.features, choice.forest, aim, capped)
            at_cap = dataclasses.replace(prepared, config=capped)
            built = build_artifact(at_cap, Path(scratch) / f"cap-{cap:g}.tamis", choice.forest, plan, scores.member_scores, heldout_scores)
            result = through_loader(at_cap, built, f"cap {cap:g}")
            kinds = ", ".join(f"{c.kind}{'' if c.kind != 'fuse' else f' r={c.width}'} {c.fpr:.3g}" for c in plan.filters)
            rows.append((cap, result, kinds))
            log(f"cap {cap:g}: {result.bytes:,} bytes, measured {result.rate:.4%}")
    uncapped = rows[0][1].bytes
    print(f"Demo at {args.target:g} (aim {aim:.4%}), one model ({choice.trees} trees): the artifact at each cap on every region's rate")
    print(f"{'cap':>6} {'bytes':>10} {'vs first':>8} {'held-out FPR':>12}  regions (kind, budget)")
    for cap, result, kinds in rows:
        print(f"{cap:>6g} {result.bytes:>10,} {result.bytes / uncapped:>8.3f} {result.rate:>12.4%}  {kinds}")


if __name__ == "__main__":
    main()
