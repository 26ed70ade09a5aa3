"""Hostile files: mutated, truncated, extended and re-checksummed artifacts (hypothesis), headers
nested deep or declaring huge counts, and files rewritten in place under an opened filter.

For every file the loader either raises FilterLoadError or opens it and answers; no other
exception, no hang (each open and query runs under a wall-clock alarm), and no allocation beyond a
bound proportional to the file's size (tracemalloc's peak while opening and answering). Checksums
catch almost every raw byte change, so the deeper strategies re-checksum what they change: a
mutated header written through the container writer, a mutated section payload, and a mutated
section table with the preamble's header length and checksum fixed up.
"""

from __future__ import annotations

import signal
import struct
import tracemalloc

import msgpack
import numpy as np
import pytest
import xxhash
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from golden_build import build_golden
from tamis import artifact
from tamis.artifact import MAGIC, MAX_HEADER_DEPTH, MAX_SECTIONS, PREAMBLE, read_artifact, write_artifact
from tamis.loader import DegradedFilter, FilterLoadError, open_filter
from tamis.trees import MAX_TREES
from test_golden import BUILD_EPOCH

# Derandomized so that CI runs the same examples every time: 2,400 examples in all, the cheap raw
# and table strategies more of them than the two that rewrite the file through the writer.
FUZZ_SETTINGS = dict(deadline=None, derandomize=True, database=None,
                     suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
MANY, FEWER = settings(max_examples=800, **FUZZ_SETTINGS), settings(max_examples=400, **FUZZ_SETTINGS)
# One open plus a few queries takes milliseconds; seconds mean a loop that should not be (the
# margin is for a loaded machine).
SECONDS_PER_EXAMPLE = 5.0
# Peak bytes allocated while opening and answering: the parsed header and the forest's checked
# copies are each a small multiple of their bytes in the file (msgpack objects, Python lists of the
# trees for the single-key walk); the constant covers the feature columns of the query batch.
ALLOCATION_PER_FILE_BYTE = 64
ALLOCATION_CONSTANT = 4 << 20
QUERIES = [b"", b"a", b"xX_Dragon99_Xx", "h\u00e9ros".encode(), b"\xff" * 40, b"q7k2m9x0w1"] + [b"%d" % i for i in range(40)]

INT64 = st.integers(-(2**63), 2**63 - 1)  # msgpack holds integers from -2^63 to 2^64 - 1
HOSTILE_VALUES = st.one_of(
    st.none(), st.booleans(), st.integers(-(2**63), 2**64 - 1), st.sampled_from([0, 1, -1, 63, 64, 65, 255, 256, 2**31, 2**32, 2**63]),
    st.floats(allow_nan=True), st.text(max_size=12), st.binary(max_size=12),
    st.lists(st.integers(-5, 300), max_size=8), st.dictionaries(st.text(max_size=5), INT64, max_size=3),
)


class Hung(Exception):
    pass


def _alarm(signum, frame):
    raise Hung(f"no answer within {SECONDS_PER_EXAMPLE} s")


@pytest.fixture(scope="module", autouse=True)
def no_fsync():
    """The writer's fsync calls make files durable, which these throwaway files need not be."""
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(artifact.os, "fsync", lambda fd: None)
        yield


@pytest.fixture(scope="module")
def seed_file(tmp_path_factory, no_fsync):
    """The golden build (a forest of 5 trees and two Bloom regions, 3.5 kB) as the file to mutate."""
    folder = tmp_path_factory.mktemp("fuzz")
    with pytest.MonkeyPatch.context() as patch:
        patch.setenv("SOURCE_DATE_EPOCH", BUILD_EPOCH)
        path = build_golden(folder / "seed")
    return {"raw": path.read_bytes(), "target": folder / "hostile.tamis", "parts": read_artifact(path)}


def check_hostile(target, raw: bytes) -> None:
    """Write raw to target; the loader must refuse it cleanly or answer, in bounded time and memory."""
    target.write_bytes(raw)
    previous = signal.signal(signal.SIGALRM, _alarm)
    signal.setitimer(signal.ITIMER_REAL, SECONDS_PER_EXAMPLE)
    tracemalloc.start()
    try:
        try:
            loaded = open_filter(target)
        except FilterLoadError:
            return
        many = loaded.contains_many(QUERIES)
        assert many.dtype == bool and many.shape == (len(QUERIES),)
        assert [loaded.contains(k) for k in QUERIES] == many.tolist()
        assert isinstance(loaded.info, dict)
    finally:
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)
    assert peak <= ALLOCATION_PER_FILE_BYTE * len(raw) + ALLOCATION_CONSTANT, (peak, len(raw))


def test_the_seed_file_opens(seed_file):
    loaded = open_filter(_write(seed_file, seed_file["raw"]))
    assert loaded.forest.trees > 0


def _write(seed_file, raw: bytes):
    seed_file["target"].write_bytes(raw)
    return seed_file["target"]


@MANY
@given(data=st.data())
def test_raw_bytes_mutated_truncated_or_extended(seed_file, data):
    raw = bytearray(seed_file["raw"])
    for _ in range(data.draw(st.integers(1, 6))):
        position = data.draw(st.integers(0, len(raw) - 1))
        raw[position] = data.draw(st.integers(0, 255))
    cut = data.draw(st.one_of(st.none(), st.integers(0, len(raw))))
    if cut is not None:
        raw = raw[:cut]
    raw += data.draw(st.binary(max_size=200))
    check_hostile(seed_file["target"], bytes(raw))


def _paths(value, prefix=()):
    """Every path to a value inside nested dicts and lists."""
    yield prefix
    if isinstance(value, dict):
        for key, item in value.items():
            yield from _paths(item, (*prefix, key))
    elif isinstance(value, list):
        for index, item in enumerate(value):
            yield from _paths(item, (*prefix, index))


def _replace(value, path, new):
    if not path:
        return new
    copy = dict(value) if isinstance(value, dict) else list(value)
    copy[path[0]] = _replace(value[path[0]], path[1:], new)
    return copy


@FEWER
@given(data=st.data())
def test_header_values_replaced_in_a_valid_container(seed_file, data):
    header, sections = seed_file["parts"]
    for _ in range(data.draw(st.integers(1, 3))):
        path = data.draw(st.sampled_from(list(_paths(header))[1:]))
        header = _replace(header, path, data.draw(HOSTILE_VALUES))
    target = seed_file["target"]
    write_artifact(target, header, {k: np.array(v) for k, v in sections.items()})
    check_hostile(target, target.read_bytes())


@FEWER
@given(data=st.data())
def test_section_payloads_changed_and_rechecksummed(seed_file, data):
    header, sections = seed_file["parts"]
    arrays = {k: np.array(v) for k, v in sections.items()}
    name = data.draw(st.sampled_from(sorted(arrays)))
    array = arrays[name]
    choice = data.draw(st.sampled_from(["bytes", "length", "dtype"]))
    if choice == "bytes" and array.size:
        raw = array.view(np.uint8).reshape(-1)
        for _ in range(data.draw(st.integers(1, 4))):
            raw[data.draw(st.integers(0, raw.size - 1))] = data.draw(st.integers(0, 255))
    elif choice == "length":
        arrays[name] = np.resize(array, data.draw(st.integers(0, 2 * array.size + 3)))
    else:
        dtype = data.draw(st.sampled_from(["<u1", "<i1", "<u2", "<i2", "<u4", "<i4", "<u8", "<i8", "<f4", "<f8"]))
        arrays[name] = np.frombuffer(array.tobytes()[: array.nbytes // np.dtype(dtype).itemsize * np.dtype(dtype).itemsize], dtype=dtype)
    target = seed_file["target"]
    write_artifact(target, header, arrays)
    check_hostile(target, target.read_bytes())


@MANY
@given(data=st.data())
def test_section_table_entries_changed_with_the_header_rechecksummed(seed_file, data):
    raw = seed_file["raw"]
    (length,) = struct.unpack_from("<I", raw, 12)
    outer = msgpack.unpackb(raw[32 : 32 + length])
    entry = data.draw(st.sampled_from(outer["sections"]))
    field = data.draw(st.sampled_from(["offset", "length", "shape", "dtype", "name", "xxh3_64"]))
    entry[field] = data.draw(st.one_of(HOSTILE_VALUES, st.integers(0, len(raw) + 128), st.lists(st.integers(0, 2**40), max_size=3)))
    packed = msgpack.packb(outer, use_bin_type=True)
    preamble = raw[:12] + struct.pack("<IQ", len(packed), xxhash.xxh3_64_intdigest(packed)) + raw[24:32]
    check_hostile(seed_file["target"], preamble + packed + raw[32 + length :])


# --- bounded parsing: deep nesting, huge counts ------------------------------------------------------


def _container(meta: bytes) -> bytes:
    """A file of format 1.0 whose header is `{"meta": <meta, already packed>, "sections": []}`, checksummed."""
    packed = b"\x82" + msgpack.packb("meta") + meta + msgpack.packb("sections") + b"\x90"
    return PREAMBLE.pack(MAGIC, 1, 0, len(packed), xxhash.xxh3_64_intdigest(packed)) + packed


def _nested(depth: int) -> bytes:
    """`depth` lists, each the only element of the one outside it, packed (msgpack's own packer
    stops short of 100,000)."""
    return b"\x91" * (depth - 1) + b"\x90"


def _refused_cleanly(seed_file, raw: bytes, match: str) -> None:
    check_hostile(seed_file["target"], raw)
    with pytest.raises(FilterLoadError, match=match):
        open_filter(seed_file["target"])
    with pytest.warns(RuntimeWarning):
        assert isinstance(open_filter(seed_file["target"], on_error="maybe"), DegradedFilter)


@pytest.mark.parametrize("depth", [MAX_HEADER_DEPTH + 1, 494, 1_000, 100_000])
def test_a_header_nested_deeper_than_the_limit_is_refused(seed_file, depth):
    # 494 lists deep fit in 546 bytes and once made the header check recurse past Python's limit;
    # 100,000 is past msgpack's own stack
    header, _ = seed_file["parts"]
    placeholder = msgpack.packb("placeholder for the nested lists")
    inside_real_meta = msgpack.packb({**header, "note": "placeholder for the nested lists"}).replace(placeholder, _nested(depth))
    for raw in (_container(inside_real_meta), _container(_nested(depth))):
        _refused_cleanly(seed_file, raw, "nest|not valid msgpack|must be a map")


def test_a_header_at_the_depth_limit_opens(seed_file):
    header, sections = seed_file["parts"]
    target = seed_file["target"]
    note = msgpack.unpackb(_nested(MAX_HEADER_DEPTH - 2))  # with the outer map and "meta": the limit
    write_artifact(target, {**header, "note": note}, {k: np.array(v) for k, v in sections.items()})
    assert open_filter(target).contains_many(QUERIES).dtype == bool


@pytest.mark.parametrize(
    "declared",
    [b"\xdd\xff\xff\xff\xff", b"\xdf\xff\xff\xff\xff", b"\xdb\xff\xff\xff\xff", b"\xc6\xff\xff\xff\xff"],
    ids=["array32", "map32", "str32", "bin32"],
)
def test_msgpack_lengths_declared_beyond_the_header_are_refused(seed_file, declared):
    # a header of a few bytes that declares 4 billion elements or bytes: refused without allocating them
    packed = b"\x82\xa4meta" + declared + b"\xa8sections\x90"
    raw = PREAMBLE.pack(MAGIC, 1, 0, len(packed), xxhash.xxh3_64_intdigest(packed)) + packed
    _refused_cleanly(seed_file, raw, "not valid msgpack")


def _lone_leaf_forest(seed_file, trees: int) -> bytes:
    """The seed file with its forest replaced by `trees` trees of one leaf each (no split)."""
    header, sections = seed_file["parts"]
    arrays = {k: np.array(v) for k, v in sections.items()}
    arrays["forest.tree_splits"] = np.zeros(trees, dtype="<u1")
    for name, dtype in (("feature", "<u1"), ("threshold", "<f4"), ("left", "<i1"), ("right", "<i1")):
        arrays[f"forest.{name}"] = np.zeros(0, dtype=dtype)
    arrays["forest.value"] = np.zeros(trees, dtype="<i2")
    target = seed_file["target"]
    write_artifact(target, {**header, "forest": {**header["forest"], "trees": trees}}, arrays)
    return target.read_bytes()


def test_more_trees_than_the_limit_are_refused(seed_file):
    # every tree costs each query a step, even a lone leaf: 100,001 of them fit in 300 kB
    _lone_leaf_forest(seed_file, 3)
    assert open_filter(seed_file["target"]).forest.trees == 3
    raw = _lone_leaf_forest(seed_file, MAX_TREES + 1)
    _refused_cleanly(seed_file, raw, f"{MAX_TREES + 1} trees.*at most {MAX_TREES}")


def test_more_sections_than_the_limit_are_refused(seed_file):
    header, sections = seed_file["parts"]
    arrays = {**{k: np.array(v) for k, v in sections.items()}, **{f"pad.{i}": np.zeros(0, dtype="<u1") for i in range(MAX_SECTIONS)}}
    target = seed_file["target"]
    with pytest.raises(ValueError, match=f"more than the {MAX_SECTIONS}"):
        write_artifact(target, header, arrays)
    with pytest.MonkeyPatch.context() as patch:  # a writer without the limit
        patch.setattr(artifact, "MAX_SECTIONS", 2 * MAX_SECTIONS)
        write_artifact(target, header, arrays)
    _refused_cleanly(seed_file, target.read_bytes(), f"at most {MAX_SECTIONS}")


# --- the file changes under an opened filter -----------------------------------------------------------


@FEWER
@given(data=st.data())
def test_a_file_rewritten_or_truncated_in_place_changes_no_answer(seed_file, data):
    target = seed_file["target"]
    target.write_bytes(seed_file["raw"])
    loaded = open_filter(target)
    before = loaded.contains_many(QUERIES).tolist()
    raw = bytearray(seed_file["raw"])
    for _ in range(data.draw(st.integers(0, 8))):
        raw[data.draw(st.integers(0, len(raw) - 1))] = data.draw(st.integers(0, 255))
    with open(target, "r+b") as handle:  # the same file, changed where it lies
        handle.write(bytes(raw))
        handle.truncate(data.draw(st.integers(0, len(raw))))
    assert loaded.contains_many(QUERIES).tolist() == before
    assert [loaded.contains(k) for k in QUERIES] == before
