"""Features: hand-counted values, chunk independence, and bit-identical results across processes."""

import hashlib
import subprocess
import sys

import numpy as np
import pytest

from tamis import features
from tamis.features import default_feature_spec, feature_count, feature_names, featurize

SPEC = default_feature_spec()


def _row(key: bytes) -> dict:
    return dict(zip(feature_names(SPEC), featurize([key], SPEC)[0].tolist()))


def test_counts_of_a_decorated_handle_match_a_hand_count():
    row = _row(b"xX_Dragon99_Xx")
    assert row["length"] == 14
    assert (row["n_lower"], row["n_upper"], row["n_digit"], row["n_separator"]) == (7, 3, 2, 2)
    assert row["share_lower"] == np.float32(7 / 14)
    assert row["vowels"] == 2  # a, o
    assert row["distinct"] == 10  # x X _ D r a g o n 9
    assert row["runs"] == 9  # x|X|_|D|ragon|99|_|X|x
    assert (row["digit_runs"], row["longest_digits"], row["lead_digits"], row["tail_digits"]) == (1, 2, 0, 0)
    assert row["first"] == row["last"] == ord("x")
    assert sum(row[f"bigram_{b}"] for b in range(SPEC["bigram_buckets"])) == 13
    assert sum(row[f"trigram_{b}"] for b in range(SPEC["trigram_buckets"])) == 12


def test_digit_runs_at_both_ends_and_non_ascii_bytes():
    row = _row("2019caf\u00e90042".encode())
    assert row["length"] == 13  # 4 + 3 + 2 (é is two bytes in UTF-8) + 4
    assert row["n_nonascii"] == 2
    assert (row["lead_digits"], row["tail_digits"], row["longest_digits"], row["digit_runs"]) == (4, 4, 4, 2)
    assert row["class_first"] == row["class_last"] == features.CLASSES.index("digit")


def test_empty_and_one_byte_keys_give_finite_rows():
    X = featurize([b"", b"a"], SPEC)
    assert X.shape == (2, feature_count(SPEC))
    assert np.isfinite(X).all()
    assert not X[0].any()
    assert _row(b"a")["share_lower"] == 1.0


def test_ngrams_never_cross_key_boundaries():
    together = featurize([b"ab", b"cd"], SPEC)
    alone = np.vstack([featurize([b"ab"], SPEC), featurize([b"cd"], SPEC)])
    assert np.array_equal(together, alone)


def test_result_does_not_depend_on_the_chunk_size(monkeypatch):
    rng = np.random.default_rng(3)
    keys = [bytes(rng.integers(32, 127, size=rng.integers(1, 30)).astype(np.uint8)) for _ in range(5000)]
    whole = featurize(keys, SPEC)
    monkeypatch.setattr(features, "_CHUNK_KEYS", 777)
    assert np.array_equal(featurize(keys, SPEC), whole)


def test_bad_spec_is_refused():
    with pytest.raises(ValueError, match="power of two"):
        featurize([b"a"], {**SPEC, "bigram_buckets": 3})
    with pytest.raises(ValueError, match="version"):
        featurize([b"a"], {**SPEC, "version": 99})


_SCRIPT = """
import sys, hashlib, numpy as np
from tamis.features import default_feature_spec, featurize
rng = np.random.default_rng(11)
keys = [bytes(rng.integers(0, 256, size=rng.integers(1, 40)).astype(np.uint8)) for _ in range(20000)]
sys.stdout.write(hashlib.sha256(featurize(keys, default_feature_spec()).tobytes()).hexdigest())
"""


def test_features_are_bit_identical_in_a_fresh_process():
    """Invariant 2: exactly-rounded arithmetic only, so another process (or implementation) agrees."""
    digests = {subprocess.run([sys.executable, "-c", _SCRIPT], capture_output=True, text=True, check=True).stdout for _ in range(2)}
    rng = np.random.default_rng(11)
    keys = [bytes(rng.integers(0, 256, size=rng.integers(1, 40)).astype(np.uint8)) for _ in range(20000)]
    here = hashlib.sha256(featurize(keys, SPEC).tobytes()).hexdigest()
    assert digests == {here}


# --- the single-key path and the feature-major layout ---------------------------------------------


def random_keys(seed: int, count: int, longest: int) -> list[bytes]:
    """Keys of every byte value 0..255, of lengths 0 to `longest`, with runs of one class mixed in."""
    rng = np.random.default_rng(seed)
    keys = []
    for _ in range(count):
        key = bytes(rng.integers(0, 256, size=rng.integers(0, longest + 1)).astype(np.uint8))
        if rng.random() < 0.3:  # digit and letter runs, so runs and digit features are exercised
            key = key[:4] + b"0123456789"[: rng.integers(1, 11)] + b"Ab" * int(rng.integers(0, 4)) + key[4:]
        keys.append(key)
    return keys + [bytes(range(256)), bytes(range(256))[::-1] * 2, b"\x00", b"9", b"a" * 300]


@pytest.mark.parametrize(
    "spec",
    [SPEC, {**SPEC, "bigram_buckets": 1, "trigram_buckets": 2, "affix_buckets": 1},
     {**SPEC, "bigram_buckets": 128, "trigram_buckets": 64, "affix_buckets": 65536}],
)
def test_featurize_one_gives_the_batch_values_bit_for_bit(spec):
    keys = random_keys(17, 4000, 40)
    batch = featurize(keys, spec)
    one = np.array([features.featurize_one(k, spec) for k in keys], dtype=np.float32)
    assert np.array_equal(one.view(np.uint32), batch.view(np.uint32))
    assert all(type(v) is float for v in features.featurize_one(keys[0], spec))


def test_featurize_columns_is_the_transpose_and_ignores_chunk_edges(monkeypatch):
    keys = random_keys(23, 3000, 30)
    data, offsets = features.pack_keys(keys)
    rows = featurize(keys, SPEC)
    assert np.array_equal(features.featurize_columns(data, offsets, SPEC), rows.T)
    for chunk in (1, 2, 3, 100):  # chunk edges between keys of one byte or none
        monkeypatch.setattr(features, "_CHUNK_KEYS", chunk)
        assert np.array_equal(features.featurize_packed(data, offsets, SPEC), rows)


def test_packed_input_is_checked():
    data, offsets = features.pack_keys([b"ab", b"c"])
    with pytest.raises(ValueError, match="uint8 data"):
        features.featurize_packed(data.astype(np.int16), offsets, SPEC)
    with pytest.raises(ValueError, match="ascend from 0"):
        features.featurize_packed(data, offsets[::-1].copy(), SPEC)
    with pytest.raises(ValueError, match="int64 offsets"):
        features.featurize_packed(data, offsets.astype(np.int32), SPEC)


def test_layout_and_spec_agree():
    layout = features.feature_layout(SPEC)
    assert layout.count == feature_count(SPEC) == len(feature_names(SPEC)) == 89
    assert layout.spec == SPEC and features.feature_layout(layout) is layout
    with pytest.raises(ValueError, match="power of two"):
        features.feature_layout({**SPEC, "affix_buckets": True})
    with pytest.raises(ValueError, match="at most 255"):
        features.feature_layout({**SPEC, "bigram_buckets": 256})
