"""Features: hand-counted values, chunk independence, and bit-identical results across processes."""

import hashlib
import subprocess
import sys

import numpy as np
import pytest

from pipeline import features
from pipeline.features import default_feature_spec, feature_count, feature_names, featurize

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
from pipeline.features import default_feature_spec, featurize
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
