"""The loader, end to end on a small real artifact: features, a trained and compiled LightGBM forest,
planned regions, backup filters, package, open; then every way a file can be unusable."""

from __future__ import annotations

import logging
import math
import os
import struct
import subprocess
import sys

import lightgbm as lgb
import msgpack
import numpy as np
import pytest

from tamis import compiled
from tamis.artifact import read_artifact, write_artifact
from tamis.sizing import bloom_fpr
from tamis.format import FORMAT_MINOR
from tamis.features import default_feature_spec, featurize
from tamis.filters import build_filters
from tamis.loader import FilterLoadError, open_filter
from tamis.booster import compile_booster
from tamis.package import package_artifact
from tamis.config import CorpusSettings
from tamis.query import KEY_BATCH_FORMS, default_path, region_of
from tamis.regions import RegionSettings, plan_regions
from tamis.trees import score_batch
from tamis_testing import REFUSE_IMPORTS

TARGET_FPR = 0.02
HASH_SEED = 0xE3B0C442
# Binomial tolerance for measured rates: 4 standard deviations (common practice).
SIGMA_TOLERANCE = 4.0
PROVENANCE = {"built_at": "2026-12-01T00:00:00Z", "tool": "tamis test", "corpus_digest": "00ff"}

BASE36 = np.frombuffer(b"abcdefghijklmnopqrstuvwxyz0123456789", dtype=np.uint8)
LETTERS = BASE36[:26]


def random_handles(rng: np.random.Generator, count: int, alphabet: np.ndarray, low: int, high: int) -> list[bytes]:
    lengths = rng.integers(low, high + 1, count)
    raw = alphabet[rng.integers(0, len(alphabet), int(lengths.sum()))].tobytes()
    ends = np.cumsum(lengths)
    return [raw[e - n : e] for e, n in zip(ends.tolist(), lengths.tolist())]


def mixed_nonmembers(rng: np.random.Generator, count: int) -> list[bytes]:
    """Mostly letter names, a quarter base-36 runs like the members: a good, imperfect classifier."""
    names = random_handles(rng, count - count // 4, LETTERS, 5, 10)
    lookalikes = random_handles(rng, count // 4, BASE36, 8, 12)
    keys = names + lookalikes
    rng.shuffle(keys)
    return keys


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """Build one artifact the way the pipeline does and keep the parts the tests compare against."""
    rng = np.random.default_rng(7)
    spec = default_feature_spec()
    members = sorted(set(random_handles(rng, 4000, BASE36, 8, 12)))
    member_set = set(members)
    train_non, val_non, fresh_non = (
        [k for k in mixed_nonmembers(rng, n) if k not in member_set] for n in (4000, 20_000, 40_000)
    )

    X_train = featurize(members + train_non, spec)
    labels = np.r_[np.ones(len(members)), np.zeros(len(train_non))]
    params = {"objective": "binary", "num_leaves": 7, "learning_rate": 0.3, "verbose": -1,
              "num_threads": 2, "seed": 1, "deterministic": True, "min_data_in_leaf": 20}
    booster = lgb.train(params, lgb.Dataset(X_train, labels), num_boost_round=12)
    forest = compile_booster(booster)

    member_scores = score_batch(forest, featurize(members, spec))
    val_scores = score_batch(forest, featurize(val_non, spec))
    plan = plan_regions(member_scores, val_scores, None, TARGET_FPR, RegionSettings(segments=200))
    member_regions = region_of(member_scores, plan.boundaries)
    filters = build_filters(members, member_regions, plan.filters, HASH_SEED)

    path = tmp_path_factory.mktemp("artifact") / "filter.tamis"
    package_artifact(path, feature_spec=spec, forest=forest, boundaries=plan.boundaries,
                     region_filters=filters, hash_seed=HASH_SEED, provenance=PROVENANCE)
    return {"path": path, "members": members, "fresh": fresh_non, "plan": plan, "filters": filters,
            "forest": forest, "spec": spec, "validation_keys": len(val_non)}


def test_the_plan_has_real_filters(built):
    # The test is only meaningful if several regions and at least one filter were built.
    assert built["plan"].regions >= 2
    assert any(f.mode in ("bloom", "fuse") for f in built["filters"])


def test_every_member_answers_yes(built):
    loaded = open_filter(built["path"])
    members = built["members"]
    assert loaded.contains_many(members).all()
    assert all(loaded.contains(k) for k in members)
    assert all(k.decode() in loaded for k in members[:500])


def test_fpr_on_fresh_nonmembers(built):
    loaded = open_filter(built["path"])
    fresh = built["fresh"]
    answers = loaded.contains_many(fresh)
    measured = answers.mean()

    # Given each fresh key's region, a key answers yes with probability 1 ("yes"), 0 ("no"), the
    # Bloom formula's rate (B. H. Bloom, CACM 13(7), 1970) or a fuse filter's 2^-r (Graf and Lemire,
    # JEA 2022): a Poisson-binomial count.
    regions = region_of(score_batch(built["forest"], featurize(fresh, built["spec"])), built["plan"].boundaries)
    rates = {"yes": lambda f: 1.0, "no": lambda f: 0.0, "fuse": lambda f: 2.0**-f.width,
             "bloom": lambda f: bloom_fpr(f.bits, f.members, f.hashes)}
    per_region = np.array([rates[f.mode](f) for f in built["filters"]])
    p = per_region[regions]
    sigma = math.sqrt(float((p * (1 - p)).sum()))
    assert abs(answers.sum() - p.sum()) <= SIGMA_TOLERANCE * max(sigma, 1.0)

    # Against the plan's expected rate, estimated on 20,000 validation keys: both sides are sample
    # rates of at most p each, so the difference has variance below p/N_val + p/N_fresh.
    expected = built["plan"].expected_fpr
    sigma = math.sqrt(expected / built["validation_keys"] + expected / len(fresh))
    assert abs(measured - expected) <= SIGMA_TOLERANCE * sigma, (measured, expected)


def test_single_and_batch_paths_agree(built):
    loaded = open_filter(built["path"])
    keys = built["fresh"][:1500] + built["members"][:500] + [b"", b"\x00", "h\u00e9ros".encode(), b"\xff\xfe"]
    batch = loaded.contains_many(keys)
    assert [loaded.contains(k) for k in keys] == batch.tolist()


def test_a_file_rewritten_in_place_after_open_changes_no_answer(built, tmp_path):
    # as a copy over the file or `rsync --inplace` does: same inode, other bytes
    path = tmp_path / "served.tamis"
    path.write_bytes(built["path"].read_bytes())
    loaded = open_filter(path)
    keys = built["members"] + built["fresh"][:5000]
    before = loaded.contains_many(keys)
    with open(path, "r+b") as handle:
        handle.write(bytes(path.stat().st_size))
    assert loaded.contains_many(keys).tolist() == before.tolist()
    assert [loaded.contains(k) for k in keys[:2000]] == before[:2000].tolist()
    assert before[: len(built["members"])].all()


_TRUNCATED_SCRIPT = """
import os, sys
from tamis.loader import open_filter
keys = sys.stdin.buffer.read().split(b"\\n")
loaded = open_filter(sys.argv[1])
os.truncate(sys.argv[1], 0)
print(int(loaded.contains_many(keys).sum()), sum(loaded.contains(k) for k in keys), len(keys))
"""


def test_a_file_truncated_in_place_after_open_still_answers(built, tmp_path):
    # in a process of its own: a mapped file that shrinks kills its reader with SIGBUS
    path = tmp_path / "served.tamis"
    path.write_bytes(built["path"].read_bytes())
    done = subprocess.run([sys.executable, "-c", _TRUNCATED_SCRIPT, str(path)], input=b"\n".join(built["members"]),
                          capture_output=True, timeout=120)
    assert done.returncode == 0, (done.returncode, done.stderr.decode()[-2000:])
    assert done.stdout.split() == [str(len(built["members"])).encode()] * 3


def test_yes_and_no_regions_answer_by_region_alone(built, tmp_path):
    # Two regions split at the median member score: members of the upper one go in, the budgets are
    # 0 and 1, so the lower region answers no and the upper yes, whatever the key.
    forest, spec = built["forest"], built["spec"]
    members = built["members"]
    scores = score_batch(forest, featurize(members, spec))
    boundary = int(np.median(scores))
    upper = [k for k, s in zip(members, scores) if s >= boundary]
    filters = build_filters(upper, np.ones(len(upper), np.int64), np.array([0.0, 1.0]), HASH_SEED)
    assert [f.mode for f in filters] == ["no", "yes"]
    path = tmp_path / "modes"
    package_artifact(path, feature_spec=spec, forest=forest, boundaries=[boundary], region_filters=filters,
                     hash_seed=HASH_SEED, provenance={})
    keys = built["fresh"][:2000] + members
    in_upper = score_batch(forest, featurize(keys, spec)) >= boundary
    loaded = open_filter(path)
    assert np.array_equal(loaded.contains_many(keys), in_upper)
    assert [loaded.contains(k) for k in keys[:300]] == in_upper[:300].tolist()


def test_key_types(built):
    loaded = open_filter(built["path"])
    keys = built["members"][:50] + built["fresh"][:50]
    as_bytes = loaded.contains_many(keys)
    as_str = [k.decode() for k in keys]
    assert np.array_equal(loaded.contains_many(as_str), as_bytes)
    assert np.array_equal(loaded.contains_many(tuple(keys)), as_bytes)
    assert np.array_equal(loaded.contains_many(iter(keys)), as_bytes)
    same_width = [i for i, k in enumerate(keys) if len(k) == len(keys[0])]  # numpy "S"/"U" need full-width elements
    assert np.array_equal(loaded.contains_many(np.array([as_str[i] for i in same_width])), as_bytes[same_width])
    assert np.array_equal(loaded.contains_many(np.array([keys[i] for i in same_width])), as_bytes[same_width])
    assert np.array_equal(loaded.contains_many(np.array(keys, dtype=object)), as_bytes)
    assert loaded.contains(as_str[0]) == loaded.contains(keys[0])
    assert loaded.contains_many([]).shape == (0,)
    with pytest.raises(TypeError, match="str or bytes, got int 5"):
        loaded.contains_many([b"a", 5])
    with pytest.raises(TypeError, match="str or bytes, got NoneType"):
        loaded.contains_many(k for k in [b"a", None])
    with pytest.raises(TypeError, match="use contains for a single key"):
        loaded.contains_many("abc")
    with pytest.raises(TypeError, match="1-d array of str or bytes"):
        loaded.contains_many(np.arange(3))
    with pytest.raises(TypeError, match="str or bytes"):
        loaded.contains(3.5)


def test_info_is_the_header(built):
    loaded = open_filter(built["path"])
    info = loaded.info
    assert info["format"] == f"2.{FORMAT_MINOR}"
    assert info["provenance"] == PROVENANCE
    assert info["feature_spec"] == built["spec"]
    assert info["boundaries"] == built["plan"].boundaries.tolist()
    assert [r["mode"] for r in info["regions"]] == [f.mode for f in built["filters"]]
    assert [r["fpr_budget"] for r in info["regions"]] == built["plan"].fprs.tolist()
    assert info["hash"]["seed"] == HASH_SEED and info["measured"] is None
    info["provenance"]["tool"] = "changed"
    assert loaded.info["provenance"] == PROVENANCE  # a copy each time


def test_packaging_is_deterministic_and_records_measured(built, tmp_path):
    again, measured = tmp_path / "again", tmp_path / "measured"
    kwargs = dict(feature_spec=built["spec"], forest=built["forest"], boundaries=built["plan"].boundaries,
                  region_filters=built["filters"], hash_seed=HASH_SEED, provenance=PROVENANCE)
    package_artifact(again, **kwargs)
    assert again.read_bytes() == built["path"].read_bytes()
    package_artifact(measured, **kwargs, measured={"fpr": 0.0195, "fpr_upper": 0.021})
    assert open_filter(measured).info["measured"] == {"fpr": 0.0195, "fpr_upper": 0.021}


def test_package_refuses_mismatched_parts(built, tmp_path):
    three = build_filters([b"a", b"b", b"c"], np.array([0, 1, 2]), np.array([0.1, 0.1, 0.1]), HASH_SEED)
    common = dict(feature_spec=built["spec"], forest=built["forest"], hash_seed=HASH_SEED, provenance={})
    with pytest.raises(ValueError, match="1 boundaries make 2 regions, got 3 filters"):
        package_artifact(tmp_path / "x", boundaries=[0], region_filters=three, **common)
    with pytest.raises(ValueError, match="ascending"):
        package_artifact(tmp_path / "x", boundaries=[5, 3], region_filters=three, **common)
    with pytest.raises(ValueError, match="integer scores"):
        package_artifact(tmp_path / "x", boundaries=[0.5, 3.0], region_filters=three, **common)
    with pytest.raises(ValueError, match="hash seed"):
        package_artifact(tmp_path / "x", boundaries=[3, 5], region_filters=three, **{**common, "hash_seed": -1})
    assert not (tmp_path / "x").exists()


# --- unusable files ---------------------------------------------------------------------------------


def section_table(raw: bytes) -> tuple[int, list[dict]]:
    (length,) = struct.unpack_from("<I", raw, 12)
    return length, msgpack.unpackb(raw[32 : 32 + length])["sections"]


def test_a_flipped_byte_in_any_section_is_refused(built, tmp_path):
    raw = built["path"].read_bytes()
    _, table = section_table(raw)
    assert {e["name"] for e in table} >= {"forest.value", "forest.threshold"}
    bad = tmp_path / "bad"
    for entry in table:
        if entry["length"] == 0:
            continue
        flipped = bytearray(raw)
        flipped[entry["offset"] + entry["length"] // 2] ^= 0x04
        bad.write_bytes(bytes(flipped))
        with pytest.raises(FilterLoadError, match=f"checksum mismatch in section '{entry['name']}'"):
            open_filter(bad)


@pytest.mark.parametrize("fraction", [0.0, 0.001, 0.01, 0.3, 0.9, 0.9999])
def test_truncated_file_is_refused(built, tmp_path, fraction):
    raw = built["path"].read_bytes()
    size = int(len(raw) * fraction)
    bad = tmp_path / "cut"
    bad.write_bytes(raw[:size])
    with pytest.raises(FilterLoadError, match=f"truncated at byte {size}\\b"):
        open_filter(bad)


def test_bad_magic_and_unknown_major_are_refused(built, tmp_path):
    raw = bytearray(built["path"].read_bytes())
    bad = tmp_path / "bad"
    bad.write_bytes(b"PK\x03\x04" + bytes(raw[4:]))
    with pytest.raises(FilterLoadError, match="not a tamis artifact"):
        open_filter(bad)
    raw[8:10] = struct.pack("<H", 3)
    bad.write_bytes(bytes(raw))
    with pytest.raises(FilterLoadError, match=f"format 3.{FORMAT_MINOR} not supported"):
        open_filter(bad)
    with pytest.raises(FilterLoadError, match="cannot read artifact"):
        open_filter(tmp_path / "absent")


def rewritten(built, tmp_path, edit) -> str:
    """A valid container whose header was changed by edit(header, sections): only the loader objects."""
    header, sections = read_artifact(built["path"])
    sections = {k: np.array(v) for k, v in sections.items()}
    edit(header, sections)
    path = tmp_path / "edited"
    write_artifact(path, header, sections)
    return path


def _first_bloom(header) -> dict:
    return next(r for r in header["regions"] if r["mode"] == "bloom")


def _first_fuse(header) -> dict:
    return next(r for r in header["regions"] if r["mode"] == "fuse")


@pytest.mark.parametrize(
    "edit, message",
    [
        (lambda h, s: h.update(kind="something-else"), "artifact kind"),
        (lambda h, s: h["hash"].update(function="md5"), "unknown hashing scheme"),
        (lambda h, s: h["hash"].update(seed="7"), "unknown hashing scheme"),
        (lambda h, s: h["feature_spec"].update(version=99), "feature spec version 99"),
        (lambda h, s: h["feature_spec"].update(bigram_buckets=16), "the forest reads"),
        (lambda h, s: h["forest"].update(trees=1), "forest meta says 1 trees"),
        (lambda h, s: s.pop("forest.value"), "forest sections must be"),
        (lambda h, s: h.update(boundaries=h["boundaries"] + [2**40]), "boundaries make"),
        (lambda h, s: h.update(boundaries=[1.5] * len(h["boundaries"])), "int64 integers"),
        (lambda h, s: h.update(boundaries=None), "'boundaries' is missing"),
        (lambda h, s: h["regions"][0].update(mode="maybe"), "unknown mode 'maybe'"),
        (lambda h, s: _first_bloom(h).update(section="filter.99"), "does not hold"),
        (lambda h, s: _first_bloom(h).update(bits=_first_bloom(h)["bits"] + 64), "uint64 words"),
        (lambda h, s: _first_bloom(h).update(hashes=1000), "between 1 and 64 probes"),
        (lambda h, s: _first_bloom(h).update(hashes=None), "integer 'bits', 'hashes'"),
        (lambda h, s: s.update({_first_bloom(h)["section"]: np.zeros(3, "<i8")}), "uint64 words"),
        (lambda h, s: _first_fuse(h).update(width=33), "fingerprint width must be 1 to 32"),
        (lambda h, s: _first_fuse(h).update(hashes=5), "arity must be one of"),
        (lambda h, s: _first_fuse(h).update(segment_length=3), "power of two"),
        (lambda h, s: _first_fuse(h).update(segment_count=_first_fuse(h)["segment_count"] + 1), "uint64 words"),
        (lambda h, s: _first_fuse(h).pop("seed"), "needs integer 'hashes', 'width', 'seed'"),
        (lambda h, s: h.update(verified_paths=["numpy", "gpu"]), "'verified_paths' must list answer paths"),
        (lambda h, s: h.update(verified_paths="numpy"), "'verified_paths' must list answer paths"),
    ],
)
def test_inconsistent_headers_are_refused(built, tmp_path, edit, message):
    with pytest.raises(FilterLoadError, match=message):
        open_filter(rewritten(built, tmp_path, edit))


def test_unknown_header_fields_and_sections_are_ignored(built, tmp_path):
    def add(header, sections):
        header["later_field"] = {"x": 1}
        sections["later.section"] = np.arange(3, dtype="<u4")

    loaded = open_filter(rewritten(built, tmp_path, add))
    assert loaded.contains_many(built["members"]).all()


# --- the answer paths a build verified ------------------------------------------------------------


@pytest.mark.parametrize("verified", [None, ["numpy"], ["numpy", "compiled"]])
def test_a_filter_serves_by_default_only_on_a_path_its_build_verified(built, tmp_path, caplog, verified):
    edit = (lambda h, s: None) if verified is None else (lambda h, s: h.update(verified_paths=verified))
    path = rewritten(built, tmp_path, edit)
    caplog.set_level(logging.WARNING, logger="tamis.loader")
    loaded = open_filter(path)
    listed = tuple(verified or ())
    assert loaded.verified_paths == listed
    expected = "compiled" if compiled.ENABLED and "compiled" in listed else "numpy"
    assert loaded.answer_path == expected
    # a fall back from the compiled path this process could run is said, once, naming why
    fell_back = compiled.ENABLED and expected == "numpy"
    assert [r.levelno for r in caplog.records] == ([logging.WARNING] if fell_back else [])
    if fell_back:
        assert "did not verify" in caplog.text and "pip install 'tamis[fast]'" in caplog.text
    assert loaded.contains_many(built["members"]).all()
    # a path named by the caller is the caller's choice, verified or not
    assert open_filter(path, answer_path=default_path()).answer_path == default_path()


# --- polars columns, packed keys ------------------------------------------------------------------


def test_polars_columns_answer_like_lists(built):
    import polars as pl

    loaded = open_filter(built["path"])
    keys = built["members"][:300] + built["fresh"][:3000] + ["h\u00e9ros_\u2603".encode(), b""]
    expected = loaded.contains_many(keys)
    text = pl.Series("handle", [k.decode() for k in keys], dtype=pl.String)
    assert np.array_equal(loaded.contains_many(text), expected)
    assert np.array_equal(loaded.contains_many(pl.Series(keys, dtype=pl.Binary)), expected)
    # a slice of a larger column (its buffers start at an offset) and an empty column
    assert np.array_equal(loaded.contains_many(text.slice(100, 500)), expected[100:600])
    assert loaded.contains_many(pl.Series([], dtype=pl.String)).shape == (0,)
    with pytest.raises(TypeError, match="null at position 1"):
        loaded.contains_many(pl.Series(["a", None, "b"]))
    with pytest.raises(TypeError, match="dtype String or Binary, got Int64"):
        loaded.contains_many(pl.Series([1, 2]))


def test_answers_do_not_depend_on_the_lookup_chunk(built, monkeypatch):
    from tamis import loader

    loaded = open_filter(built["path"])
    keys = built["fresh"][:5000] + built["members"][:1000]
    whole = loaded.contains_many(keys)
    monkeypatch.setattr(loader, "LOOKUP_CHUNK_KEYS", 333)
    assert np.array_equal(loaded.contains_many(keys), whole)


# --- degraded mode --------------------------------------------------------------------------------


def test_an_unusable_file_opens_degraded_with_on_error_maybe(built, tmp_path, caplog):
    raw = bytearray(built["path"].read_bytes())
    raw[-1] ^= 0xFF  # the last section's checksum no longer matches
    bad = tmp_path / "damaged.tamis"
    bad.write_bytes(bytes(raw))
    with pytest.raises(FilterLoadError):
        open_filter(bad)
    with pytest.warns(RuntimeWarning, match="every key now answers 'maybe'") as warned:
        with caplog.at_level("ERROR", logger="tamis.loader"):
            degraded = open_filter(bad, on_error="maybe")
    assert len(warned) == 1
    assert [r.levelname for r in caplog.records] == ["ERROR"] and "checksum mismatch" in caplog.records[0].getMessage()
    assert degraded.degraded and degraded.info["degraded"] is True
    assert "checksum mismatch" in degraded.info["reason"]
    keys = built["members"][:100] + built["fresh"][:100]
    assert degraded.contains_many(keys).all() and degraded.contains_many(keys).shape == (200,)
    assert all(degraded.contains(k) for k in keys[:20]) and keys[0] in degraded
    with pytest.raises(TypeError, match="str or bytes"):
        degraded.contains_many([b"a", 5])  # bad input is still bad input


def test_degraded_mode_covers_a_missing_file_and_leaves_good_files_alone(built, tmp_path, recwarn):
    missing = open_filter(tmp_path / "absent.tamis", on_error="maybe")
    assert missing.degraded and "cannot read artifact" in missing.info["reason"]
    recwarn.clear()
    good = open_filter(built["path"], on_error="maybe")
    assert not good.degraded and good.info["degraded"] is False
    assert not [w for w in recwarn if issubclass(w.category, RuntimeWarning)]
    with pytest.raises(ValueError, match="on_error must be one of"):
        open_filter(built["path"], on_error="ignore")


# --- compatibility --------------------------------------------------------------------------------


def test_a_format_1_file_holds_no_fuse_region(built, tmp_path):
    # Binary fuse regions came with format 2.0: a file that says 1.x and holds one is inconsistent.
    raw = bytearray(built["path"].read_bytes())
    raw[8:10] = struct.pack("<H", 1)
    path = tmp_path / "old.tamis"
    path.write_bytes(bytes(raw))
    with pytest.raises(FilterLoadError, match=r"unknown mode 'fuse' \(format 1.x knows"):
        open_filter(path)


def test_a_newer_minor_with_unknown_fields_and_sections_opens(built, tmp_path):
    header, sections = read_artifact(built["path"])
    header["added_in_2_3"] = {"note": "a later writer's field"}
    header["regions"][0]["later_region_field"] = [1, 2, 3]
    sections = {**{k: np.array(v) for k, v in sections.items()}, "later.table": np.arange(5, dtype="<u2")}
    path = tmp_path / "newer.tamis"
    write_artifact(path, header, sections)
    raw = bytearray(path.read_bytes())
    raw[10:12] = struct.pack("<H", 3)  # minor version 3; no checksum covers the preamble's version
    path.write_bytes(bytes(raw))
    loaded = open_filter(path)
    assert loaded.info["format"] == "2.3" and loaded.info["added_in_2_3"] == {"note": "a later writer's field"}
    assert np.array_equal(loaded.contains_many(built["fresh"][:2000]), open_filter(built["path"]).contains_many(built["fresh"][:2000]))
    raw[8:10] = struct.pack("<H", 3)
    path.write_bytes(bytes(raw))
    with pytest.raises(FilterLoadError, match="format 3.3 not supported"):
        open_filter(path)


# --- no build stack in the loader's process -----------------------------------------------------

# the build stack, and numba: the loader then runs its plain numpy path
_BLOCKED = "polars,lightgbm,scipy,prefect,pandas,pyarrow,sklearn,matplotlib,numba,llvmlite"
_BLOCKED_SCRIPT = REFUSE_IMPORTS + """
from tamis import compiled
from tamis.loader import open_filter
assert not compiled.ENABLED
keys = [line.encode() for line in sys.stdin.read().split("\\n")]
loaded = open_filter(sys.argv[2])
many = loaded.contains_many(keys)
one = [loaded.contains(k) for k in keys]
assert many.tolist() == one
print("".join("1" if a else "0" for a in many))
"""


def test_the_loader_works_where_the_build_stack_cannot_be_imported(built):
    keys = [k.decode() for k in built["members"][:200] + built["fresh"][:800]]
    expected = open_filter(built["path"]).contains_many(keys)
    done = subprocess.run([sys.executable, "-c", _BLOCKED_SCRIPT, _BLOCKED, str(built["path"])], input="\n".join(keys),
                          capture_output=True, text=True, check=True)
    assert done.stdout.strip() == "".join("1" if a else "0" for a in expected)
    # the blocker really blocks: importing the build stack in the same way fails
    for module in ("polars", "numba"):
        probe = REFUSE_IMPORTS + f"import {module}\n"
        assert subprocess.run([sys.executable, "-c", probe, _BLOCKED], capture_output=True, text=True).returncode != 0


# The longest key a build accepts by default (corpus.max_key_bytes).
LONGEST_KEY = CorpusSettings().max_key_bytes


def tricky_members() -> list[bytes]:
    """Members a byte-losing input would miss: trailing and interior NUL, non-ASCII (valid UTF-8,
    so every str form can carry them too), and two keys of the longest allowed length."""
    long_a = ("\u00e9\x00" + "k" * (LONGEST_KEY - 6) + "\u2603").encode()  # 2 + 1 + n-6 + 3 bytes, n-3 characters
    long_b = ("\u00fc" * 3 + "\x00" + "q" * (LONGEST_KEY - 7)).encode()  # 6 + 1 + n-7 bytes, n-3 characters
    assert len(long_a) == len(long_b) == LONGEST_KEY and len(long_a.decode()) == len(long_b.decode())
    return [b"tok\x00", b"x\x00\x00", b"\x00", "h\u00e9ros_\u2603".encode(), b"a\x00b", long_a, long_b]


@pytest.fixture(scope="module")
def tricky(built, tmp_path_factory):
    """The module's forest and plan, with the tricky members inserted beside the others."""
    members = built["members"] + tricky_members()
    regions = region_of(score_batch(built["forest"], featurize(members, built["spec"])), built["plan"].boundaries)
    filters = build_filters(members, regions, built["plan"].filters, HASH_SEED)
    path = tmp_path_factory.mktemp("tricky") / "filter.tamis"
    package_artifact(path, feature_spec=built["spec"], forest=built["forest"], boundaries=built["plan"].boundaries,
                     region_filters=filters, hash_seed=HASH_SEED, provenance=PROVENANCE)
    return open_filter(path)


def batch_in_form(form: str, keys: list[bytes]):
    """The keys in one of query.KEY_BATCH_FORMS; fixed-width forms get the keys that fill one width."""
    import polars as pl

    if form in ("numpy S", "numpy U"):
        keys = [k for k in keys if len(k) == LONGEST_KEY]
    text = [k.decode() for k in keys]
    return keys, {
        "list": lambda: list(text),
        "tuple": lambda: tuple(keys),
        "iterable": lambda: iter(keys),
        "numpy object": lambda: np.array(keys, dtype=object),
        "numpy S": lambda: np.array(keys),
        "numpy U": lambda: np.array(text),
        "polars String": lambda: pl.Series(text, dtype=pl.String),
        "polars Binary": lambda: pl.Series(keys, dtype=pl.Binary),
    }[form]()


@pytest.mark.parametrize("form", KEY_BATCH_FORMS)
def test_every_batch_form_answers_members_with_nul_non_ascii_and_the_longest_key(tricky, form):
    keys, batch = batch_in_form(form, tricky_members())
    assert keys and tricky.contains_many(batch).all(), form
    assert all(tricky.contains(key) for key in keys)
    assert all(tricky.contains(key.decode()) for key in keys)


@pytest.mark.parametrize("keys", [[b"tok\x00", b"abcd"], [b"x\x00\x00", b"abc"], [b"ab", b"abc"], ["tok\x00", "abcd"]])
def test_a_fixed_width_array_that_may_have_lost_nul_bytes_is_refused(tricky, keys):
    """numpy reads b"tok\x00" of an S4 array as b"tok": answering it could say "no" to a member."""
    with pytest.raises(TypeError, match="drops trailing NULs.*dtype=object"):
        tricky.contains_many(np.array(keys))
