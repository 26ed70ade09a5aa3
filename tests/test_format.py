"""The reference artifacts of format 1.0 and 2.0 and their test vectors (tests/make_vectors.py wrote them).

`tests/data/format-1.0.tamis` was written by the format-1.0 writer and is never rewritten: every
later loader must open it and answer every vector's key exactly as recorded, on every answer path.
Each step of the query path is also checked on its own against the vectors (features, score,
region, hash, probes), and a second reader written from FORMAT.md alone, without tamis's code,
must answer every vector too: the specification is complete enough to implement.
"""

from __future__ import annotations

import json
import struct
from pathlib import Path

import msgpack
import numpy as np
import pytest
import xxhash

from tamis.bloom import hash_keys, probe_positions
from tamis.features import featurize
from tamis.loader import open_filter
from tamis.query import ANSWER_PATHS, available_paths, region_of
from tamis.trees import score_batch

DATA = Path(__file__).resolve().parent / "data"
ARTIFACT = DATA / "format-1.0.tamis"
VECTORS = json.loads((DATA / "format-1.0.vectors.json").read_text(encoding="utf-8"))["vectors"]
KEYS = [bytes.fromhex(v["key_hex"]) for v in VECTORS]
ANSWERS = [v["answer"] for v in VECTORS]


@pytest.fixture(scope="module")
def reference():
    return open_filter(ARTIFACT)


def test_the_vectors_cover_every_region_mode_and_both_answers(reference):
    modes = {reference.info["regions"][v["region"]]["mode"] for v in VECTORS}
    assert modes == {"no", "bloom", "yes"} and set(ANSWERS) == {True, False}
    assert any(v["key_text"] is None for v in VECTORS) and any(not v["key_text"].isascii() for v in VECTORS if v["key_text"])


@pytest.mark.parametrize("answer_path", ANSWER_PATHS)
def test_the_reference_artifact_answers_as_recorded_on_every_path(reference, answer_path):
    if answer_path not in available_paths():
        pytest.skip("numba is not installed or is disabled")
    on_path = reference.using(answer_path)
    assert on_path.contains_many(KEYS).tolist() == ANSWERS
    assert [on_path.contains(key) for key in KEYS] == ANSWERS
    texts = [v["key_text"] for v in VECTORS if v["key_text"] is not None]
    assert on_path.contains_many(texts).tolist() == [v["answer"] for v in VECTORS if v["key_text"] is not None]
    assert [on_path.contains(text) for text in texts] == [v["answer"] for v in VECTORS if v["key_text"] is not None]


def test_each_step_matches_the_vectors(reference):
    features = featurize(KEYS, reference.feature_spec)
    expected = np.array([[int(h, 16) for h in v["features_f32_hex"]] for v in VECTORS], dtype=np.uint32)
    assert np.array_equal(features.view(np.uint32), expected)
    scores = score_batch(reference.forest, features)
    assert scores.tolist() == [v["score"] for v in VECTORS]
    regions = region_of(scores, reference.boundaries)
    assert regions.tolist() == [v["region"] for v in VECTORS]
    hashes = hash_keys(KEYS, reference.hash_seed)
    assert hashes.low.tolist() == [v["hash_low"] for v in VECTORS]
    assert hashes.high.tolist() == [v["hash_high"] for v in VECTORS]
    for v, key in zip(VECTORS, KEYS):
        entry = reference.info["regions"][v["region"]]
        if entry["mode"] == "bloom":
            positions = probe_positions(hash_keys([key], reference.hash_seed), entry["bits"], entry["hashes"])[:, 0]
            assert positions.tolist() == v["probes"]


# --- the format-2.0 reference: binary fuse regions beside Bloom -----------------------------------
FORMAT_2 = json.loads((DATA / "format-2.0.answers.json").read_text(encoding="utf-8"))["answers"]


def test_the_format_2_answers_cover_both_filter_kinds_and_both_answers():
    assert {(entry["mode"], entry["answer"]) for entry in FORMAT_2} >= {("bloom", True), ("bloom", False),
                                                                         ("fuse", True), ("fuse", False)}


@pytest.mark.parametrize("answer_path", ANSWER_PATHS)
def test_the_format_2_reference_answers_as_recorded_on_every_path(answer_path):
    if answer_path not in available_paths():
        pytest.skip("numba is not installed or is disabled")
    loaded = open_filter(DATA / "format-2.0.tamis", answer_path=answer_path)
    assert loaded.info["format"] == "2.0"
    keys = [bytes.fromhex(entry["key_hex"]) for entry in FORMAT_2]
    expected = [entry["answer"] for entry in FORMAT_2]
    assert loaded.contains_many(keys).tolist() == expected
    assert [loaded.contains(key) for key in keys] == expected


# --- a second reader, written from FORMAT.md alone -----------------------------------------------
# Plain Python with struct, msgpack and xxhash, none of tamis's own code: if it answers every vector
# as recorded, FORMAT.md says enough to write a reader.


def spec_sections(raw: bytes) -> tuple[dict, dict]:
    """(meta, {name: list of values}) of an artifact, per FORMAT.md section 2."""
    magic, major, _minor, header_length, header_sum = struct.unpack_from("<8sHHIQ8x", raw)
    assert magic == b"\x89TAMIS\r\n" and major == 1
    header = raw[32 : 32 + header_length]
    assert xxhash.xxh3_64_intdigest(header) == header_sum
    decoded = msgpack.unpackb(header, raw=False)
    codes = {"|u1": "B", "|i1": "b", "<u2": "H", "<i2": "h", "<u4": "I", "<i4": "i", "<u8": "Q", "<i8": "q", "<f4": "f"}
    sections = {}
    for entry in decoded["sections"]:
        payload = raw[entry["offset"] : entry["offset"] + entry["length"]]
        assert entry["offset"] % 64 == 0 and xxhash.xxh3_64_intdigest(payload) == entry["xxh3_64"]
        count = entry["shape"][0]
        sections[entry["name"]] = list(struct.unpack(f"<{count}{codes[entry['dtype']][-1]}", payload))
    return decoded["meta"], sections


def spec_features(k: bytes, spec: dict) -> list[float]:
    """FORMAT.md section 4."""
    def cls(byte: int) -> int:
        for code, (low, high) in enumerate(((97, 122), (65, 90), (48, 57))):
            if low <= byte <= high:
                return code
        return 3 if byte in b"_-. " else 4 if byte < 128 else 5

    def fold(byte: int) -> int:
        return byte + 32 if 65 <= byte <= 90 else byte

    def bucket(code: int, buckets: int) -> int:
        return ((code * 2654435761) % 2**32) >> (33 - buckets.bit_length())

    b2, b3, ba = spec["bigram_buckets"], spec["trigram_buckets"], spec["affix_buckets"]
    n = len(k)
    row = [0] * (25 + b2 + b3)
    if n == 0:
        return row
    classes = [cls(byte) for byte in k]
    runs = []  # [class, length]
    for c in classes:
        if runs and runs[-1][0] == c:
            runs[-1][1] += 1
        else:
            runs.append([c, 1])
    digit_runs = [length for c, length in runs if c == 2]
    counts = [classes.count(c) for c in range(6)]
    row[0:7] = [n, *counts]
    # float64 quotient, then float32: struct's "f" rounds to nearest even
    row[7:12] = [struct.unpack("<f", struct.pack("<f", counts[c] / n))[0] for c in (0, 1, 2, 3, 5)]
    row[12:25] = [
        sum(byte in b"aeiouAEIOU" for byte in k), len(set(k)), len(runs), len(digit_runs), max(digit_runs, default=0),
        runs[0][1] if runs[0][0] == 2 else 0, runs[-1][1] if runs[-1][0] == 2 else 0, classes[0], classes[-1],
        fold(k[0]), fold(k[-1]), bucket(fold(k[0]) * 256 + fold(k[min(1, n - 1)]), ba),
        bucket(fold(k[max(n - 2, 0)]) * 256 + fold(k[n - 1]), ba),
    ]
    for p in range(n - 1):
        row[25 + bucket(fold(k[p]) * 256 + fold(k[p + 1]), b2)] += 1
    for p in range(n - 2):
        row[25 + b2 + bucket(fold(k[p]) * 65536 + fold(k[p + 1]) * 256 + fold(k[p + 2]), b3)] += 1
    return row


def spec_score(x: list[float], meta: dict, sections: dict) -> int:
    """FORMAT.md section 5 (thresholds are float32 values, held exactly by Python floats)."""
    s, node_base, leaf_base = meta["bias"], 0, 0
    f = {name: sections["forest." + name] for name in ("tree_splits", "feature", "threshold", "left", "right", "value")}
    for splits in f["tree_splits"]:
        c = 0 if splits else -1
        while c >= 0:
            j = node_base + c
            c = f["right"][j] if x[f["feature"][j]] > f["threshold"][j] else f["left"][j]
        s += f["value"][leaf_base - 1 - c]
        node_base, leaf_base = node_base + splits, leaf_base + splits + 1
    return s


def spec_answer(key: bytes, meta: dict, sections: dict) -> tuple[list[float], int, int, bool]:
    """FORMAT.md sections 6 and 7: (features, score, region, answer)."""
    x = spec_features(key, meta["feature_spec"])
    score = spec_score(x, meta["forest"], sections)
    region_index = sum(boundary <= score for boundary in meta["boundaries"])
    region = meta["regions"][region_index]
    if region["mode"] != "bloom":
        return x, score, region_index, region["mode"] == "yes"
    value = xxhash.xxh3_128_intdigest(key, meta["hash"]["seed"])
    m, words = region["bits"], sections[region["section"]]
    x_, y = (value % 2**64) % m, (value >> 64) % m
    for i in range(region["hashes"]):
        if i:
            x_, y = (x_ + y) % m, (y + i) % m
        if not (words[x_ // 64] >> (x_ % 64)) & 1:
            return x, score, region_index, False
    return x, score, region_index, True


def test_a_reader_written_from_the_specification_answers_every_vector():
    meta, sections = spec_sections(ARTIFACT.read_bytes())
    for v, key in zip(VECTORS, KEYS):
        x, score, region, answer = spec_answer(key, meta, sections)
        assert [f"{bits:08x}" for bits in struct.unpack(f"<{len(x)}I", struct.pack(f"<{len(x)}f", *x))] == v["features_f32_hex"]
        assert (score, region, answer) == (v["score"], v["region"], v["answer"]), key
