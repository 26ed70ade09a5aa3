"""A tiny fixed build, stage by stage, for the golden-bytes and reproducibility tests.

`build_golden(folder)` writes a fixed corpus (2,000 members, 20,000 non-members, drawn from a
seeded generator; at a tenth of that no forest pays for its own bytes, and the build would pin a
plain Bloom filter only), runs the stages in the build flow's order with fixed settings (no Prefect: the stage
functions themselves), and packages the artifact; it returns the artifact's path. Run as a script
(`python tests/golden_build.py FOLDER`) it prints the artifact's xxh3-64, so a test can build in a
fresh process. SOURCE_DATE_EPOCH must be set: it fixes the build time in the provenance.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

from tamis.config import BuildConfig, CorpusSettings, FilterSettings, ModelSettings, TargetSettings
from tamis.corpus import load_corpus
from tamis.features import default_feature_spec, featurize
from tamis.filters import build_filters
from tamis.model import fit_model
from tamis.package import package_artifact
from tamis.provenance import build_provenance
from tamis.query import region_of
from tamis.regions import RegionSettings, plan_regions
from tamis.trees import score_batch

MEMBERS, NON_MEMBERS, CORPUS_SEED = 2_000, 20_000, 20261201
BASE36 = "abcdefghijklmnopqrstuvwxyz0123456789"

# Small and single-threaded: LightGBM with deterministic=True and one thread gives the same trees
# on every run of the same LightGBM version (its results may change between versions).
MODEL = ModelSettings(leaves=(7,), learning_rates=(0.5,), max_trees=10, checkpoint_every=5, patience=1,
                      threads=1, seed=0, min_leaf_rows=5)
REGIONS = RegionSettings(segments=100)
TARGET_FPR = 0.01
HASH_SEED = 0x601DE2


def _keys(rng: np.random.Generator, count: int, alphabet: str, low: int, high: int) -> list[str]:
    lengths = rng.integers(low, high + 1, count)
    text = "".join(alphabet[i] for i in rng.integers(0, len(alphabet), int(lengths.sum())))
    ends = np.cumsum(lengths)
    return [text[end - n : end] for end, n in zip(ends.tolist(), lengths.tolist())]


def write_fixed_corpus(folder: Path) -> tuple[Path, Path]:
    """Members: base-36 runs of 8 to 12 characters; non-members: mostly letter names of 5 to 10,
    a quarter base-36 look-alikes. One key a line, no counts."""
    rng = np.random.default_rng(CORPUS_SEED)
    members = sorted(set(_keys(rng, MEMBERS, BASE36, 8, 12)))
    taken = set(members)
    names = _keys(rng, NON_MEMBERS - NON_MEMBERS // 4, BASE36[:26], 5, 10) + _keys(rng, NON_MEMBERS // 4, BASE36, 8, 12)
    non_members = [k for k in dict.fromkeys(names) if k not in taken]
    folder.mkdir(parents=True, exist_ok=True)
    members_path, non_members_path = folder / "members.txt", folder / "non_members.txt"
    members_path.write_text("".join(k + "\n" for k in members), encoding="utf-8")
    non_members_path.write_text("".join(k + "\n" for k in non_members), encoding="utf-8")
    return members_path, non_members_path


def build_golden(folder: Path) -> Path:
    members_path, non_members_path = write_fixed_corpus(Path(folder))
    config = BuildConfig(
        corpus=CorpusSettings(members=members_path, non_members=non_members_path),
        target=TargetSettings(fpr=TARGET_FPR),
        model=MODEL,
        regions=REGIONS,
        filters=FilterSettings(hash_seed=HASH_SEED),
    )
    corpus = load_corpus(members_path, non_members_path, config.corpus)
    spec = default_feature_spec()
    X = {name: featurize(keys, spec) for name, keys in
         (("members", corpus.members), ("train", corpus.train.keys), ("validation", corpus.validation.keys))}

    def filter_bytes(member_scores, val_scores, val_weights) -> float:
        return plan_regions(member_scores, val_scores, val_weights, TARGET_FPR, REGIONS, refine=False).estimated_total_bits / 8

    choice = fit_model(X["members"], X["train"], corpus.train.counts.astype(np.float64), X["validation"],
                       corpus.validation.counts.astype(np.float64), filter_bytes, MODEL)
    member_scores = score_batch(choice.forest, X["members"])
    plan = plan_regions(member_scores, score_batch(choice.forest, X["validation"]), corpus.validation.counts,
                        TARGET_FPR, REGIONS)
    filters = build_filters(corpus.members, region_of(member_scores, plan.boundaries), plan.filters, HASH_SEED)
    # The tool version is pinned so that a release does not change the golden bytes.
    provenance = {**build_provenance(config, corpus), "tool_version": "golden", "additions_through": 0}
    path = Path(folder) / "golden.tamis"
    package_artifact(path, feature_spec=spec, forest=choice.forest, boundaries=plan.boundaries,
                     region_filters=filters, hash_seed=HASH_SEED, provenance=provenance)
    return path


if __name__ == "__main__":
    import xxhash

    sys.stdout.write(xxhash.xxh3_64_hexdigest(build_golden(Path(sys.argv[1])).read_bytes()))
