"""Test vectors of the artifact format: keys -> features -> score -> region -> answer.

    python tests/make_vectors.py              # rewrite tests/data/format-1.0.vectors.json
    python tests/make_vectors.py --artifact   # first rebuild tests/data/format-1.0.tamis as well
    python tests/make_vectors.py --format-2   # write tests/data/format-2.0.tamis and its answers

The reference artifact `tests/data/format-1.0.tamis` was written once, by the format-1.0 writer of
2026-12-02, and stays as it is: every later loader must answer it as its vectors say
(tests/test_format.py). It holds the fixed corpus of tests/golden_build.py (2,000 members) and the
forest that build trains, with four regions chosen by hand so that every region mode appears: "no"
below the lowest member score, two Bloom regions, and "yes" at the top.

The vectors are computed from the artifact's bytes by the reference (numpy) implementation of each
step, one record per key: the key's bytes (hex, and the text when they are UTF-8), its feature row
(float32 bit patterns), its integer score, its region, the two halves of its xxh3-128 hash, the
Bloom bit positions probed when its region has a Bloom filter, and the answer. The keys cover
members, non-members, empty and one-byte keys, non-ASCII text, raw bytes that are not UTF-8, a NUL,
and a key longer than 240 bytes (xxh3's long-input path).

The format-2.0 reference `tests/data/format-2.0.tamis` is the golden build of tests/golden_build.py
as written by the format-2.0 writer (a forest, Bloom regions and a binary fuse region); it is kept
with the answers the reference path gives to the same keys (`format-2.0.answers.json`), which every
later loader must give too.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
DATA = HERE / "data"
ARTIFACT = DATA / "format-1.0.tamis"
VECTORS = DATA / "format-1.0.vectors.json"
ARTIFACT_2 = DATA / "format-2.0.tamis"
ANSWERS_2 = DATA / "format-2.0.answers.json"
sys.path.insert(0, str(HERE))

from golden_build import HASH_SEED, build_golden, write_fixed_corpus  # noqa: E402
from tamis.bloom import hash_keys, probe_positions  # noqa: E402
from tamis.features import featurize  # noqa: E402
from tamis.loader import open_filter  # noqa: E402
from tamis.query import region_of  # noqa: E402
from tamis.trees import score_batch  # noqa: E402

# 2026-12-02T00:00:00Z, the build time the reference artifacts record.
BUILD_EPOCH = "1796169600"

# Keys of every shape a reader must get right (see the module docstring); members and non-members
# of the fixed corpus are added to them.
SHAPED_KEYS = [
    b"",
    b"a",
    b"7",
    b"\x00",
    b"ab\x00",
    b"frost_wyrm_1984",
    b"EMBERFALL-Warden.07",
    "h\u00e9ros_\u2603_\U0001f409".encode(),
    "\u708e\u306e\u7adc".encode(),
    "\u00c6r\u00f8sk\u00f8bing".encode(),
    b"\xff\xfe\x80\x00\xc3",
    bytes(range(256)),
    b"x7" * 150 + b"END",
]


def write_reference_artifact(path: Path) -> None:
    """The golden build's forest and members, regrouped into four regions of every mode."""
    from tamis.filters import build_filters
    from tamis.package import package_artifact

    with tempfile.TemporaryDirectory() as work:
        golden = open_filter(build_golden(Path(work)))
        members = [line.encode() for line in (Path(work) / "members.txt").read_text().splitlines()]
    forest, spec = golden.forest, golden.feature_spec
    scores = score_batch(forest, featurize(members, spec))
    # no members below the lowest member score; above it, the distinct member scores split in thirds
    distinct = np.unique(scores)
    boundaries = [int(distinct[0]), int(distinct[len(distinct) // 3]), int(distinct[2 * len(distinct) // 3])]
    fprs = np.array([0.0, 0.05, 0.01, 1.0])
    filters = build_filters(members, region_of(scores, boundaries), fprs, HASH_SEED)
    package_artifact(path, feature_spec=spec, forest=forest, boundaries=boundaries, region_filters=filters,
                     hash_seed=HASH_SEED, provenance={"built_at": "2026-12-02T00:00:00Z", "purpose": "format-1.0 reference"})


def write_format_2_reference(path: Path) -> None:
    """The golden build as it is: format 2.0, with a forest, Bloom regions and a binary fuse region."""
    with tempfile.TemporaryDirectory() as work:
        shutil.copyfile(build_golden(Path(work)), path)


def format_2_answers(path: Path) -> dict:
    """The reference (numpy) path's answer to every key of `vector_keys`, and the mode of its region."""
    loaded = open_filter(path, answer_path="numpy")
    keys = vector_keys()
    regions = region_of(score_batch(loaded.forest, featurize(keys, loaded.feature_spec)), loaded.boundaries)
    modes = [loaded.info["regions"][int(region)]["mode"] for region in regions]
    return {"artifact": path.name,
            "answers": [{"key_hex": key.hex(), "mode": mode, "answer": bool(answer)}
                        for key, mode, answer in zip(keys, modes, loaded.contains_many(keys).tolist())]}


def vector_keys() -> list[bytes]:
    with tempfile.TemporaryDirectory() as work:
        members_path, non_members_path = write_fixed_corpus(Path(work))
        members = members_path.read_text().splitlines()
        non_members = non_members_path.read_text().splitlines()
    rng = np.random.default_rng(20261202)
    picked = [members[i] for i in rng.choice(len(members), 24, replace=False)]
    picked += [non_members[i] for i in rng.choice(len(non_members), 40, replace=False)]
    return SHAPED_KEYS + [key.encode() for key in picked]


def record(key: bytes, features: np.ndarray, score: int, region: int, loaded, answer: bool) -> dict:
    hashes = hash_keys([key], loaded.hash_seed)
    entry = loaded.info["regions"][region]
    probes = None
    if entry["mode"] == "bloom":
        probes = probe_positions(hashes, entry["bits"], entry["hashes"])[:, 0].tolist()
    return {
        "key_hex": key.hex(),
        "key_text": key.decode("utf-8") if _is_utf8(key) else None,
        "features_f32_hex": [f"{bits:08x}" for bits in features.view(np.uint32).tolist()],
        "score": score,
        "region": region,
        "hash_low": int(hashes.low[0]),
        "hash_high": int(hashes.high[0]),
        "probes": probes,
        "answer": answer,
    }


def _is_utf8(key: bytes) -> bool:
    try:
        key.decode("utf-8")
    except UnicodeDecodeError:
        return False
    return True


def make_vectors(path: Path) -> dict:
    """Every key of `vector_keys` through each step of the reference implementation."""
    loaded = open_filter(path, answer_path="numpy")  # the reference
    keys = vector_keys()
    features = featurize(keys, loaded.feature_spec)
    scores = score_batch(loaded.forest, features)
    regions = region_of(scores, loaded.boundaries)
    answers = loaded.contains_many(keys)
    return {
        "artifact": path.name,
        "hash_seed": loaded.hash_seed,
        "vectors": [record(k, f, int(s), int(r), loaded, bool(a))
                    for k, f, s, r, a in zip(keys, features, scores.tolist(), regions.tolist(), answers.tolist())],
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--artifact", action="store_true", help=f"rebuild {ARTIFACT.name} first (changes the reference)")
    parser.add_argument("--format-2", action="store_true", help=f"write {ARTIFACT_2.name} and {ANSWERS_2.name} instead")
    args = parser.parse_args()
    DATA.mkdir(exist_ok=True)
    if args.format_2:
        os.environ["SOURCE_DATE_EPOCH"] = BUILD_EPOCH
        write_format_2_reference(ARTIFACT_2)
        made = format_2_answers(ARTIFACT_2)
        lines = ",\n".join(json.dumps(entry) for entry in made.pop("answers"))
        ANSWERS_2.write_text(json.dumps(made)[:-1] + ', "answers": [\n' + lines + "\n]}\n", encoding="utf-8")
        print(f"{ARTIFACT_2} ({ARTIFACT_2.stat().st_size:,} bytes), {ANSWERS_2}")
        return
    if args.artifact:
        os.environ["SOURCE_DATE_EPOCH"] = BUILD_EPOCH
        write_reference_artifact(ARTIFACT)
    made = make_vectors(ARTIFACT)
    lines = ",\n".join(json.dumps(entry) for entry in made.pop("vectors"))  # one key a line
    VECTORS.write_text(json.dumps(made)[:-1] + ', "vectors": [\n' + lines + "\n]}\n", encoding="utf-8")
    print(f"{ARTIFACT} ({ARTIFACT.stat().st_size:,} bytes), {VECTORS} ({VECTORS.stat().st_size:,} bytes)")


if __name__ == "__main__":
    main()
