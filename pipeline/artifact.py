"""The binary artifact container: a bounded msgpack header and aligned, checksummed numeric sections.

Layout of format 2.1, the same as 1.0 (all integers little-endian):

    offset  size  field
    ------  ----  -----------------------------------------------------------------------------
         0     8  magic  89 54 41 4D 49 53 0D 0A  ("\\x89TAMIS\\r\\n")
         8     2  major version (u16)   readers refuse a major they do not know
        10     2  minor version (u16)   a newer minor only adds header fields or sections
        12     4  header length H (u32), at most 1 MiB
        16     8  xxh3-64 (seed 0) of the H header bytes (u64)
        24     8  reserved: zero when written, ignored when read
        32     H  header: a msgpack map {"meta": {...}, "sections": [entry, ...]}
    32 + H        zero padding up to the first section
                  sections, in the order of the table, each at an offset that is a multiple of 64,
                  zero padding between them; the file ends where the last section ends

    +----------+-----+-----+-----+--------+------+----------------+---------+---+---------+
    |  magic   | maj | min |  H  | hsum   | rsvd | msgpack header | pad..64 | S | pad..64 | S ...
    +----------+-----+-----+-----+--------+------+----------------+---------+---+---------+
    0          8     10    12    16       24     32               32+H     64*j

    section table entry: {"name": str, "dtype": "<u8" | "<i8" | "<f4" | ..., "shape": [int, ...],
                          "offset": absolute byte offset, "length": bytes, "xxh3_64": u64 of those bytes}

The constants live in `tamis.format`; FORMAT.md specifies the whole format. Map keys in the header
are sorted and nothing time-dependent is added here, so equal inputs give byte-identical files.
Reading takes one copy of the file into memory, checks it and returns read-only numpy views over
that copy: a file rewritten or truncated in place afterwards changes nothing already read (a shared
mapping would answer from the new bytes unchecked, or fault), and nothing in the file is ever executed.
"""

from __future__ import annotations

import math
import os
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import xxhash

from tamis.format import (
    ALIGNMENT,
    ALLOWED_DTYPES,
    FORMAT_MAJOR,
    FORMAT_MINOR,
    MAGIC,
    MAX_HEADER_BYTES,
    MAX_HEADER_DEPTH,
    MAX_SECTIONS,
    PREAMBLE,
    READABLE_MAJORS,
)


class ArtifactError(Exception):
    """An artifact file that cannot be read: missing, truncated, corrupted or of an unknown format."""


def _align(offset: int) -> int:
    return -(-offset // ALIGNMENT) * ALIGNMENT


# ---------------------------------------------------------------------------------------------------
# Writing
# ---------------------------------------------------------------------------------------------------


def canonical_header(value: Any, where: tuple = ()) -> Any:
    """`value` as plain msgpack types with every map's keys sorted; numpy scalars become Python ones.

    Raises ValueError naming the offending field for anything else (arrays belong in sections), and
    for maps and lists nested deeper than MAX_HEADER_DEPTH. `where` is the path of keys and indices
    down to `value`; it is spelled out only for the error, so every value costs the same small work.
    """
    if isinstance(value, (Mapping, list, tuple)) and len(where) >= MAX_HEADER_DEPTH:
        raise ValueError(f"{_spelled(where)} nests maps and lists more than {MAX_HEADER_DEPTH} deep")
    if isinstance(value, Mapping):
        bad = [k for k in value if not isinstance(k, str)]
        if bad:
            raise ValueError(f"{_spelled(where)} has a non-string key {bad[0]!r:.80}; header maps need string keys")
        return {k: canonical_header(value[k], (*where, k)) for k in sorted(value)}
    if isinstance(value, (list, tuple)):
        return [canonical_header(v, (*where, i)) for i, v in enumerate(value)]
    if isinstance(value, np.generic) and value.dtype.kind in "biufSU":
        value = value.item()
    if value is None or isinstance(value, (bool, str, bytes, float)):
        return value
    if isinstance(value, int):
        if not -(2**63) <= value < 2**64:
            raise ValueError(f"{_spelled(where)} = {value} does not fit in 64 bits")
        return value
    raise ValueError(
        f"{_spelled(where)} has type {type(value).__name__}; a header holds only None, bool, int, float, str, "
        "bytes, lists and string-keyed maps (put arrays in sections)"
    )


def _spelled(where: tuple) -> str:
    """A path of keys and indices as `header.regions[2].mode` (long keys cut short)."""
    return "header" + "".join(f"[{step}]" if isinstance(step, int) else f".{step:.40}" for step in where)


def _storable(name: str, array: np.ndarray) -> np.ndarray:
    """The section as a C-contiguous little-endian array of an allowed dtype."""
    if not isinstance(name, str) or not name:
        raise ValueError(f"section names must be non-empty strings, got {name!r}")
    array = np.asarray(array)
    little = array.dtype.newbyteorder("<") if array.dtype.kind in "iuf" else array.dtype
    if little.str not in ALLOWED_DTYPES:
        raise ValueError(
            f"section {name!r} has dtype {array.dtype}; sections hold only {sorted(ALLOWED_DTYPES)}"
        )
    return np.ascontiguousarray(array, dtype=little)


def _payload(array: np.ndarray) -> np.ndarray:
    """The bytes of a C-contiguous array, as a flat uint8 view."""
    return array.reshape(-1).view(np.uint8)


def _pack(value: Any) -> bytes:
    return msgpack.packb(value, use_bin_type=True)


def _layout(meta: Any, arrays: dict[str, np.ndarray]) -> tuple[bytes, list[dict]]:
    """The packed header and the section table, with absolute offsets.

    Offsets depend on the header's length, which depends on the offsets' msgpack widths; the length
    only grows from one pass to the next and is bounded, so the loop settles within a few passes.
    """
    checksums = {name: xxhash.xxh3_64_intdigest(_payload(array)) for name, array in arrays.items()}
    header_length = 0
    while True:
        offset = _align(PREAMBLE.size + header_length)
        table = []
        for name, array in arrays.items():
            table.append(
                {  # keys in sorted order, like every map in the header
                    "dtype": array.dtype.str,
                    "length": array.nbytes,
                    "name": name,
                    "offset": offset,
                    "shape": list(array.shape),
                    "xxh3_64": checksums[name],
                }
            )
            offset = _align(offset + array.nbytes)
        packed = _pack({"meta": meta, "sections": table})
        if len(packed) == header_length:
            return packed, table
        header_length = len(packed)


def _chunks(packed: bytes, arrays: dict[str, np.ndarray], table: list[dict]):
    """The file's bytes in order: preamble, header, then padding and payload for each section."""
    yield PREAMBLE.pack(MAGIC, FORMAT_MAJOR, FORMAT_MINOR, len(packed), xxhash.xxh3_64_intdigest(packed))
    yield packed
    position = PREAMBLE.size + len(packed)
    for entry in table:
        yield bytes(entry["offset"] - position)
        yield _payload(arrays[entry["name"]])
        position = entry["offset"] + entry["length"]


def fsync_directory(directory: Path) -> None:
    """Make a rename inside directory durable (common practice on POSIX file systems)."""
    fd = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_atomically(path: Path, chunks: Iterable[bytes]) -> None:
    """Write the chunks to `path` through a temporary file in the same folder, flushed to disk and
    then renamed over `path`; on any failure the temporary file is removed and `path` is left as it
    was. The temporary name is random, so writers in other processes never share one."""
    temporary = path.with_name(f".{path.name}.{os.urandom(8).hex()}.tmp")
    try:
        with open(temporary, "xb") as out:
            for chunk in chunks:
                out.write(chunk)
            out.flush()
            os.fsync(out.fileno())
        os.replace(temporary, path)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise
    fsync_directory(path.parent)


def write_artifact(path: str | os.PathLike, header: Mapping[str, Any], sections: Mapping[str, np.ndarray]) -> None:
    """Write header (plain msgpack-able data) and named numeric sections to path, atomically
    (`write_atomically`). Sections are written in name order."""
    meta = canonical_header(header)
    if len(sections) > MAX_SECTIONS:
        raise ValueError(f"{len(sections)} sections, more than the {MAX_SECTIONS} a file may hold")
    arrays = {name: _storable(name, sections[name]) for name in sorted(sections)}
    packed, table = _layout(meta, arrays)
    if len(packed) > MAX_HEADER_BYTES:
        raise ValueError(f"header takes {len(packed)} bytes, more than the {MAX_HEADER_BYTES}-byte limit")
    write_atomically(Path(path), _chunks(packed, arrays, table))


# ---------------------------------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------------------------------


def _refuse_extension(code: int, data: bytes) -> None:
    raise ArtifactError(f"header uses msgpack extension type {code}, which this format never writes")


def _read_file(path: Path) -> bytes:
    """The file's bytes, read once into memory: the copy that is checked and then answered from."""
    try:
        with open(path, "rb") as handle:
            return handle.read()
    except OSError as error:
        raise ArtifactError(f"cannot read artifact {path}: {error.strerror or error}") from error


def _read_preamble(path: Path, data: bytes) -> tuple[tuple[int, int], int, int]:
    """Check magic and version; return ((major, minor), header length, header checksum)."""
    size = len(data)
    head = data[: len(MAGIC)]
    if head != MAGIC:
        if MAGIC.startswith(head):
            raise ArtifactError(f"{path}: truncated at byte {size} (inside the magic bytes)")
        raise ArtifactError(f"{path}: not a tamis artifact (starts with {head!r}, expected {MAGIC!r})")
    if size < PREAMBLE.size:
        raise ArtifactError(f"{path}: truncated at byte {size} (the fixed preamble needs {PREAMBLE.size})")
    _, major, minor, header_length, header_sum = PREAMBLE.unpack_from(data, 0)
    if major not in READABLE_MAJORS:
        raise ArtifactError(
            f"{path}: format {major}.{minor} not supported (this reader reads "
            f"{' and '.join(f'{m}.x' for m in READABLE_MAJORS)}); "
            "use a tamis release that knows this format"
        )
    if header_length > MAX_HEADER_BYTES:
        raise ArtifactError(
            f"{path}: header length {header_length} exceeds the {MAX_HEADER_BYTES}-byte limit"
        )
    if PREAMBLE.size + header_length > size:
        raise ArtifactError(
            f"{path}: truncated at byte {size} (the header ends at byte {PREAMBLE.size + header_length})"
        )
    return (major, minor), header_length, header_sum


def _decode_header(path: Path, raw: bytes, expected_sum: int) -> dict:
    if xxhash.xxh3_64_intdigest(raw) != expected_sum:
        raise ArtifactError(f"{path}: checksum mismatch in the header")
    try:
        decoded = msgpack.unpackb(raw, raw=False, ext_hook=_refuse_extension)
    except (ValueError, TypeError, msgpack.UnpackException) as error:
        raise ArtifactError(f"{path}: header is not valid msgpack ({error})") from error
    if not (
        isinstance(decoded, dict)
        and isinstance(decoded.get("meta"), dict)
        and isinstance(decoded.get("sections"), list)
    ):
        raise ArtifactError(f"{path}: header must be a map with a 'meta' map and a 'sections' list")
    try:
        # msgpack decodes timestamps (extension -1) itself, past the extension hook: hold every
        # value to the types this format writes
        canonical_header(decoded)
    except ValueError as error:
        raise ArtifactError(f"{path}: {error}") from None
    return decoded


def _is_count(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool) and value >= 0


def _check_entry(path: Path, entry: Any, index: int) -> dict:
    """One section table entry with the right field types and a consistent dtype, shape and length."""
    if not isinstance(entry, dict) or not isinstance(entry.get("name"), str):
        raise ArtifactError(f"{path}: section table entry {index} has no name")
    name = entry["name"]
    fields_ok = (
        isinstance(entry.get("dtype"), str)
        and isinstance(entry.get("shape"), list)
        and all(_is_count(d) for d in entry["shape"])
        and all(_is_count(entry.get(k)) for k in ("offset", "length", "xxh3_64"))
    )
    if not fields_ok:
        raise ArtifactError(f"{path}: section {name!r} has a malformed table entry")
    if entry["dtype"] not in ALLOWED_DTYPES:
        raise ArtifactError(f"{path}: section {name!r} has dtype {entry['dtype']!r}, not an allowed one")
    expected = math.prod(entry["shape"]) * np.dtype(entry["dtype"]).itemsize
    if expected != entry["length"]:
        raise ArtifactError(
            f"{path}: section {name!r} has shape {entry['shape']} of {entry['dtype']} "
            f"({expected} bytes) but length {entry['length']}"
        )
    if entry["offset"] % ALIGNMENT:
        raise ArtifactError(f"{path}: section {name!r} starts at byte {entry['offset']}, not a multiple of {ALIGNMENT}")
    return entry


def _check_bounds(path: Path, table: list[dict], header_end: int, size: int) -> None:
    """Sections in order, after the header, not overlapping, inside the file, which ends at the last."""
    names = [entry["name"] for entry in table]
    if len(set(names)) != len(names):
        raise ArtifactError(f"{path}: section names repeat in the table: {names}")
    end = header_end
    for entry in table:
        start, stop = entry["offset"], entry["offset"] + entry["length"]
        if start < end:
            raise ArtifactError(
                f"{path}: section {entry['name']!r} starts at byte {start}, inside earlier data ending at {end}"
            )
        if stop > size:
            raise ArtifactError(
                f"{path}: truncated at byte {size} (section {entry['name']!r} needs bytes {start} to {stop})"
            )
        end = stop
    if size != end:
        raise ArtifactError(f"{path}: {size - end} unexpected bytes after the last section (ends at byte {end})")


@dataclass(frozen=True, eq=False)
class Artifact:
    """A checked artifact: its header (the meta map written), its sections (read-only views of the
    file's bytes as read) and the format version (major, minor) the file declares."""

    header: dict
    sections: dict[str, np.ndarray]
    version: tuple[int, int]


def load_artifact(path: str | os.PathLike) -> Artifact:
    """Read an artifact file into memory once and check it (`check_artifact`)."""
    path = Path(path)
    return check_artifact(path, _read_file(path))


def check_artifact(path: Path, data: bytes) -> Artifact:
    """Check the bytes of an artifact read from `path`.

    Checks magic, major version, header bounds and checksum, every section's table entry, bounds and
    checksum before returning; raises ArtifactError saying what is wrong and where. The sections are
    views of `data`, so what was checked is what is answered from, whatever happens to the file.
    """
    version, header_length, header_sum = _read_preamble(path, data)
    decoded = _decode_header(path, data[PREAMBLE.size : PREAMBLE.size + header_length], header_sum)
    if len(decoded["sections"]) > MAX_SECTIONS:
        raise ArtifactError(f"{path}: the section table lists {len(decoded['sections'])} sections; at most {MAX_SECTIONS} are allowed")
    table = [_check_entry(path, entry, i) for i, entry in enumerate(decoded["sections"])]
    _check_bounds(path, table, PREAMBLE.size + header_length, len(data))
    sections = {}
    for entry in table:
        payload = np.frombuffer(data, dtype=np.uint8, count=entry["length"], offset=entry["offset"])
        if xxhash.xxh3_64_intdigest(payload) != entry["xxh3_64"]:
            raise ArtifactError(f"{path}: checksum mismatch in section {entry['name']!r}")
        sections[entry["name"]] = payload.view(entry["dtype"]).reshape(entry["shape"])
    return Artifact(decoded["meta"], sections, version)


def read_artifact(path: str | os.PathLike) -> tuple[dict, dict[str, np.ndarray]]:
    """(header, sections) of `load_artifact`."""
    loaded = load_artifact(path)
    return loaded.header, loaded.sections
