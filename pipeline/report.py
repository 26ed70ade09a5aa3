"""The build report (`report.json` beside each artifact): what was built, how big, how good, how the
version in service fares on today's corpus (`drift`), and why the gate decided as it did. Field
names follow the contract in the design notes (§4); `gate.checks` lists every rule's verdict."""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

from tamis.baselines import best_static_filter
from tamis.sizing import bloom_bits, lower_bound_bits
from tamis.config import BuildConfig
from tamis.corpus import AUTO_HEAVY_COUNT, Corpus
from tamis.drift import Drift
from tamis.planning import SettledPlan
from tamis.verify import GateCheck, PlainComparison, Verification, refusal_reasons


def settings_of(config: BuildConfig) -> dict:
    """Every setting of the build as JSON values (paths as text, lists for tuples)."""
    def plain(value):
        if isinstance(value, dict):
            return {key: plain(item) for key, item in value.items()}
        if isinstance(value, (tuple, list)):
            return [plain(item) for item in value]
        return str(value) if isinstance(value, Path) else value

    return plain(dataclasses.asdict(config))


def tau_rule(heavy_count: int) -> str:
    """How tau was chosen: corpus.heavy_count when set, the automatic rule when it is 0."""
    if heavy_count:
        return f"set: corpus.heavy_count = {heavy_count:,}"
    return (f"automatic (corpus.heavy_count = 0): {AUTO_HEAVY_COUNT} lookups, from which a key's window count is "
            f"known to within 25% at 95% confidence")


def _region_rows(plan, filters, planned: list[float], measured) -> list[dict]:
    """One row a region: its plan, its filter, its rate as built for random keys (`planned_fpr`)
    and as measured on its held-out light keys (`measured_fpr`, of `measured_keys` keys)."""
    bounds = [None, *(int(b) for b in plan.boundaries), None]
    return [
        {
            "score_from": bounds[i],
            "score_to": bounds[i + 1],
            "members": int(plan.member_counts[i]),
            "nonmember_share": float(plan.nonmember_shares[i]),
            "fpr": float(plan.fprs[i]),
            "mode": region.mode,
            "kind": region.mode,
            "width": region.width if region.mode == "fuse" else None,
            "hashes": region.hashes if region.mode in ("bloom", "fuse") else None,
            "filter_bytes": region.nbytes,
            "planned_fpr": planned[i],
            "measured_fpr": measured[i].fpr if measured else None,
            "measured_keys": measured[i].keys if measured else None,
        }
        for i, region in enumerate(filters)
    ]


def build_report(
    *,
    config: BuildConfig,
    corpus: Corpus,
    provenance: dict,
    aim_fpr: float,
    choice,
    plan,
    filters,
    verification: Verification,
    total_bytes: int,
    checks: list[GateCheck],
    drift: Drift,
    comparison: PlainComparison,
    published_plain: bool,
    settled: SettledPlan,
    plain_settled: SettledPlan,
    version: int | None,
    timings: dict,
) -> dict:
    members = len(corpus.members)
    target = config.target.fpr
    bloom_bytes = math.ceil(bloom_bits(members, target) / 8)
    static = best_static_filter(members, target) if members else None
    reasons = refusal_reasons(checks)
    return {
        "version": version,
        "build_id": provenance["build_id"],
        "built_at": provenance["built_at"],
        "provenance": provenance,
        "paths": {
            "members": str(config.corpus.members),
            "non_members": str(config.corpus.non_members),
            "store": str(config.store.path),
            "artifact": None,  # known once the build is published or refused
        },
        "config": settings_of(config),
        "target_fpr": target,
        "aim_fpr": aim_fpr,
        "corpus": {
            "members": members,
            "non_members": corpus.non_members,
            "lookups": corpus.lookups,
            "has_counts": corpus.has_counts,
            "split": {part: len(getattr(corpus, part).keys) for part in ("heavy", "train", "validation", "check", "heldout")},
            **corpus.stats,
        },
        "heldout": verification.heldout.as_report(),
        "strata": {
            **verification.heldout.strata_report(),
            "aim_fpr": aim_fpr,
            "aim_below_half_target": aim_fpr < target / 2,
            "tau_rule": tau_rule(config.corpus.heavy_count),
            "hot_keys": settled.sparing.as_report(),
        },
        "false_negatives": verification.false_negatives,
        "answer_paths": verification.paths.as_report(),
        "size": {
            "total_bytes": total_bytes,
            "model_bytes": choice.forest.nbytes,
            "filter_bytes": sum(f.nbytes for f in filters),
            # the container's magic, msgpack header, section table and alignment padding
            "layout_bytes": total_bytes - choice.forest.nbytes - sum(f.nbytes for f in filters),
            "bits_per_member": total_bytes * 8 / members,
        },
        "baseline": {
            "bloom_bytes": bloom_bytes,
            "ratio": total_bytes / bloom_bytes if bloom_bytes else None,
            "lower_bound_bytes": lower_bound_bits(members, target) / 8,
            "static_bytes": static.bytes if static else 0,
            "static_kind": static.kind if static else None,
            "static_ratio": total_bytes / static.bytes if static else None,
        },
        "separation": {"kl_bits": plan.kl_bits, "auc": choice.auc},
        "model": {"trees": choice.trees, "params": choice.params, "candidates": choice.candidates},
        "regions": _region_rows(plan, filters, settled.rates, verification.by_region),
        "expected_fpr": plan.expected_fpr,
        "plan": settled.as_report(),
        "drift": drift.as_report(),
        "plain_filter": {**comparison.as_report(config.gate.when_model_does_not_pay, published_plain),
                         "plan": plain_settled.as_report()},
        "gate": {"passed": not reasons, "reasons": reasons, "checks": [check.as_report() for check in checks]},
        "timings": timings,
    }
