"""The artifact container: layout as documented, determinism, atomic writes, and every refusal."""

from __future__ import annotations

import os
import struct

import msgpack
import numpy as np
import pytest
import xxhash

from tamis import artifact
from tamis.artifact import ArtifactError, load_artifact, read_artifact, write_artifact

HEADER = {"name": "emberfall-bans", "counts": [1, 2, 3], "nested": {"z": 1.5, "a": None, "b": b"\x00\xff"}}


def sample_sections() -> dict[str, np.ndarray]:
    return {
        "words": np.arange(10, dtype=np.uint64) * np.uint64(0x0101010101010101),
        "grid": np.arange(12, dtype=np.float32).reshape(3, 4),
        "small": np.array([-3, 7], dtype=np.int8),
        "empty": np.zeros(0, dtype=np.int64),
    }


@pytest.fixture
def written(tmp_path):
    path = tmp_path / "filter.tamis"
    write_artifact(path, HEADER, sample_sections())
    return path


def preamble(packed: bytes, major: int = 1, minor: int = 0, length: int | None = None) -> bytes:
    """The 32 fixed bytes in front of a packed header, as the module docstring lays them out."""
    length = len(packed) if length is None else length
    return b"\x89TAMIS\r\n" + struct.pack("<HHIQ", major, minor, length, xxhash.xxh3_64_intdigest(packed)) + bytes(8)


def hand_built(header: dict, payloads: list[tuple[dict, bytes]], major: int = 1, minor: int = 0) -> bytes:
    """An artifact assembled from the layout in the module docstring, independently of the writer.

    Each payload comes with its table entry minus offset and length, which are filled in here, after
    guessing the header length until the offsets it implies leave it unchanged.
    """
    header_length, packed = -1, b""
    while len(packed) != header_length:
        header_length = len(packed)
        table, position = [], -(-(32 + header_length) // 64) * 64
        for entry, data in payloads:
            table.append({**entry, "offset": position, "length": len(data)})
            position = -(-(position + len(data)) // 64) * 64
        packed = msgpack.packb({"meta": header, "sections": table}, use_bin_type=True)
    out = bytearray(preamble(packed, major, minor) + packed)
    for entry, (_, data) in zip(table, payloads):
        out += bytes(entry["offset"] - len(out)) + data
    return bytes(out)


def entry_for(name: str, array: np.ndarray, **extra) -> tuple[dict, bytes]:
    data = array.tobytes()
    entry = {"name": name, "dtype": array.dtype.str, "shape": list(array.shape)}
    return {**entry, "xxh3_64": xxhash.xxh3_64_intdigest(data), **extra}, data


def table_of(path) -> tuple[int, dict]:
    raw = path.read_bytes()
    (length,) = struct.unpack_from("<I", raw, 12)
    return length, msgpack.unpackb(raw[32 : 32 + length])


# --- round trip and layout --------------------------------------------------------------------------


def test_round_trip_gives_equal_read_only_views(written):
    header, sections = read_artifact(written)
    assert header == HEADER
    expected = sample_sections()
    assert list(sections) == sorted(expected)
    for name, array in expected.items():
        got = sections[name]
        assert got.dtype == array.dtype.newbyteorder("<") and got.shape == array.shape
        assert np.array_equal(got, array)
        assert not got.flags.writeable and not got.flags.owndata  # a view of the mapped file


def test_layout_matches_the_documented_format(written):
    raw = written.read_bytes()
    magic, major, minor, length, header_sum = struct.unpack_from("<8sHHIQ", raw, 0)
    assert magic == b"\x89TAMIS\r\n" and (major, minor) == (2, 2)
    assert raw[24:32] == bytes(8)
    assert xxhash.xxh3_64_intdigest(raw[32 : 32 + length]) == header_sum
    table = msgpack.unpackb(raw[32 : 32 + length])["sections"]
    previous_end = 32 + length
    for entry in table:
        assert entry["offset"] % 64 == 0
        assert raw[previous_end : entry["offset"]] == bytes(entry["offset"] - previous_end)
        data = raw[entry["offset"] : entry["offset"] + entry["length"]]
        assert xxhash.xxh3_64_intdigest(data) == entry["xxh3_64"]
        stored = np.frombuffer(data, entry["dtype"]).reshape(entry["shape"])
        assert np.array_equal(stored, sample_sections()[entry["name"]])
        previous_end = entry["offset"] + entry["length"]
    assert len(raw) == previous_end


def test_big_endian_input_is_stored_little_endian(tmp_path):
    path = tmp_path / "a"
    write_artifact(path, {}, {"x": np.array([1, 2], dtype=">u4")})
    _, sections = read_artifact(path)
    assert sections["x"].dtype.str == "<u4" and sections["x"].tolist() == [1, 2]


# xxh3-64 of the file written from HEADER and sample_sections(), recorded when format 2.2 was fixed
# (the bytes of 1.0 but for the major and minor versions; e9422242a9f29bc3 as 2.1, 873d6656f25fc8af as 2.0).
GOLDEN_DIGEST = "8a6a022d9c1c494b"


def test_writes_are_deterministic_and_the_format_is_pinned(tmp_path):
    first, second = tmp_path / "1", tmp_path / "2"
    write_artifact(first, HEADER, sample_sections())
    reordered = {"nested": {"b": b"\x00\xff", "a": None, "z": 1.5}, "counts": [1, 2, 3], "name": "emberfall-bans"}
    write_artifact(second, reordered, dict(reversed(list(sample_sections().items()))))
    assert first.read_bytes() == second.read_bytes()
    # Golden digest of the bytes: if this changes, the format changed; bump the version deliberately.
    assert xxhash.xxh3_64_hexdigest(first.read_bytes()) == GOLDEN_DIGEST


def test_hand_built_file_is_read(tmp_path):
    path = tmp_path / "hand"
    path.write_bytes(hand_built({"k": 1}, [entry_for("a", np.arange(3, dtype="<i8"))]))
    header, sections = read_artifact(path)
    assert header == {"k": 1} and sections["a"].tolist() == [0, 1, 2]


def test_newer_minor_with_unknown_fields_is_accepted(tmp_path):
    path = tmp_path / "newer"
    raw = hand_built({"k": 1}, [entry_for("a", np.arange(3, dtype="<u2"), compression=None)], minor=7)
    path.write_bytes(raw)
    header, sections = read_artifact(path)
    assert header == {"k": 1} and sections["a"].tolist() == [0, 1, 2]
    assert load_artifact(path).version == (1, 7)


def test_no_sections(tmp_path):
    path = tmp_path / "bare"
    write_artifact(path, {"only": "header"}, {})
    assert read_artifact(path) == ({"only": "header"}, {})


# --- refusals when reading --------------------------------------------------------------------------


def test_every_truncation_is_reported_with_its_length(written, tmp_path):
    raw = written.read_bytes()
    cut = tmp_path / "cut"
    for size in range(len(raw)):
        cut.write_bytes(raw[:size])
        with pytest.raises(ArtifactError, match=f"truncated at byte {size}\\b"):
            read_artifact(cut)


def test_a_flipped_byte_in_any_section_or_the_header_is_caught(written, tmp_path):
    raw = written.read_bytes()
    length, decoded = table_of(written)
    bad = tmp_path / "bad"
    for entry in decoded["sections"]:
        for position in range(entry["offset"], entry["offset"] + entry["length"]):
            flipped = bytearray(raw)
            flipped[position] ^= 0x10
            bad.write_bytes(bytes(flipped))
            with pytest.raises(ArtifactError, match=f"checksum mismatch in section '{entry['name']}'"):
                read_artifact(bad)
    for position in range(32, 32 + length):
        flipped = bytearray(raw)
        flipped[position] ^= 0x01
        bad.write_bytes(bytes(flipped))
        with pytest.raises(ArtifactError, match="checksum mismatch in the header"):
            read_artifact(bad)


def test_bad_magic(written):
    raw = bytearray(written.read_bytes())
    raw[1:6] = b"OTHER"
    written.write_bytes(bytes(raw))
    with pytest.raises(ArtifactError, match="not a tamis artifact"):
        read_artifact(written)


def test_other_files_are_not_artifacts(tmp_path):
    path = tmp_path / "text"
    path.write_text("member-1\nmember-2\n")
    with pytest.raises(ArtifactError, match="not a tamis artifact"):
        read_artifact(path)


@pytest.mark.parametrize("major, minor", [(3, 0), (0, 9), (65535, 1)])
def test_unknown_major_is_refused(tmp_path, major, minor):
    path = tmp_path / "future"
    path.write_bytes(hand_built({}, [], major=major, minor=minor))
    with pytest.raises(ArtifactError, match=f"format {major}.{minor} not supported"):
        read_artifact(path)


def test_oversized_header_length_is_refused_before_reading(tmp_path):
    path = tmp_path / "huge"
    path.write_bytes(preamble(b"", length=(1 << 20) + 1))
    with pytest.raises(ArtifactError, match="exceeds the 1048576-byte limit"):
        read_artifact(path)


def test_missing_file(tmp_path):
    with pytest.raises(ArtifactError, match="cannot read artifact"):
        read_artifact(tmp_path / "absent")


def test_directory_is_not_readable(tmp_path):
    with pytest.raises(ArtifactError, match="cannot read artifact"):
        read_artifact(tmp_path)


ARRAY = np.arange(4, dtype="<u8")


@pytest.mark.parametrize(
    "payloads, message",
    [
        ([entry_for("a", ARRAY, dtype="|O")], "dtype '|O', not an allowed one"),
        ([entry_for("a", ARRAY, dtype=">u8")], "dtype '>u8', not an allowed one"),
        ([entry_for("a", ARRAY, dtype="<c16", shape=[2])], "dtype '<c16', not an allowed one"),
        ([entry_for("a", ARRAY, shape=[5])], r"shape \[5\] of <u8 \(40 bytes\) but length 32"),
        ([entry_for("a", ARRAY, shape=[-4])], "malformed table entry"),
        ([entry_for("a", ARRAY, shape=4)], "malformed table entry"),
        ([entry_for("a", ARRAY, xxh3_64="x")], "malformed table entry"),
        ([entry_for("a", ARRAY), entry_for("a", ARRAY)], "section names repeat"),
        ([({"dtype": "<u8"}, ARRAY.tobytes())], "entry 0 has no name"),
    ],
)
def test_bad_section_entries_are_refused(tmp_path, payloads, message):
    path = tmp_path / "bad"
    path.write_bytes(hand_built({}, payloads))
    with pytest.raises(ArtifactError, match=message):
        read_artifact(path)


def rewrite_table(path, edit) -> None:
    """Rewrite a written file's header after edit(decoded) changes it, keeping the payload bytes."""
    raw = path.read_bytes()
    length, decoded = table_of(path)
    edit(decoded)
    packed = msgpack.packb(decoded, use_bin_type=True)
    # Offsets are absolute, so the payload must not move: a shorter header is padded with zeros.
    assert len(packed) <= length, "the edit must not grow the header"
    path.write_bytes(preamble(packed) + packed + bytes(length - len(packed)) + raw[32 + length :])


def test_misaligned_section_is_refused(written):
    rewrite_table(written, lambda d: d["sections"][0].update(offset=d["sections"][0]["offset"] + 8))
    with pytest.raises(ArtifactError, match="not a multiple of 64"):
        read_artifact(written)


def test_overlapping_sections_are_refused(written):
    def overlap(decoded):
        decoded["sections"][2]["offset"] = decoded["sections"][1]["offset"]

    rewrite_table(written, overlap)
    with pytest.raises(ArtifactError, match="inside earlier data"):
        read_artifact(written)


def test_section_over_the_header_is_refused(written):
    rewrite_table(written, lambda d: d["sections"][0].update(offset=0))
    with pytest.raises(ArtifactError, match="inside earlier data"):
        read_artifact(written)


def test_trailing_bytes_are_refused(written):
    with open(written, "ab") as out:
        out.write(b"extra")
    with pytest.raises(ArtifactError, match="5 unexpected bytes after the last section"):
        read_artifact(written)


@pytest.mark.parametrize(
    "packed, message",
    [
        (b"\xc1", "not valid msgpack"),
        (msgpack.packb([1, 2]), "must be a map"),
        (msgpack.packb({"meta": {}}), "must be a map"),
        (msgpack.packb({"meta": 3, "sections": []}), "must be a map"),
        (msgpack.packb({"meta": {"x": msgpack.ExtType(5, b"code")}, "sections": []}), "extension type 5"),
        (msgpack.packb({"meta": {}, "sections": []}) + b"\x00", "not valid msgpack"),
    ],
)
def test_bad_headers_are_refused(tmp_path, packed, message):
    path = tmp_path / "bad"
    path.write_bytes(preamble(packed) + packed)
    with pytest.raises(ArtifactError, match=message):
        read_artifact(path)


# --- refusals and atomicity when writing ------------------------------------------------------------


@pytest.mark.parametrize(
    "header, message",
    [
        ({"a": np.zeros(3)}, r"header\.a has type ndarray"),
        ({"a": {1: 2}}, r"header\.a has a non-string key 1"),
        ({"a": [1, {2, 3}]}, r"header\.a\[1\] has type set"),
        ({"a": 2**64}, "does not fit in 64 bits"),
    ],
)
def test_bad_header_values_are_refused(tmp_path, header, message):
    with pytest.raises(ValueError, match=message):
        write_artifact(tmp_path / "x", header, {})
    assert list(tmp_path.iterdir()) == []


def test_numpy_scalars_in_the_header_become_plain(tmp_path):
    path = tmp_path / "x"
    write_artifact(path, {"i": np.int64(-4), "u": np.uint64(2**63), "f": np.float32(0.5), "b": np.bool_(True)}, {})
    assert read_artifact(path)[0] == {"b": True, "f": 0.5, "i": -4, "u": 2**63}


@pytest.mark.parametrize("array", [np.array([True]), np.array([1 + 2j]), np.array(["s"]), np.array([object()])])
def test_bad_section_dtypes_are_refused(tmp_path, array):
    with pytest.raises(ValueError, match="sections hold only"):
        write_artifact(tmp_path / "x", {}, {"s": array})


def test_oversized_header_is_refused_when_writing(tmp_path):
    with pytest.raises(ValueError, match="more than the 1048576-byte limit"):
        write_artifact(tmp_path / "x", {"blob": b"\x00" * (1 << 20)}, {})
    assert list(tmp_path.iterdir()) == []


def test_failed_write_leaves_the_old_file_and_no_temporary(written, monkeypatch):
    before = written.read_bytes()

    def failing_fsync(fd):
        raise OSError("disk full")

    monkeypatch.setattr(artifact.os, "fsync", failing_fsync)
    with pytest.raises(OSError, match="disk full"):
        write_artifact(written, {"new": True}, {"x": np.ones(1000, np.uint64)})
    monkeypatch.undo()
    assert written.read_bytes() == before
    assert os.listdir(written.parent) == [written.name]


def test_failed_rename_leaves_no_temporary(tmp_path, monkeypatch):
    def failing_replace(source, target):
        raise OSError("read-only file system")

    monkeypatch.setattr(artifact.os, "replace", failing_replace)
    with pytest.raises(OSError, match="read-only file system"):
        write_artifact(tmp_path / "x", {}, {"x": np.ones(3, np.uint8)})
    assert list(tmp_path.iterdir()) == []
