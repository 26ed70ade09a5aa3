"""Members added between builds: whole batches of keys that a store serves at once, on top of the
version in service, and that the next build folds in.

    STORE/additions/
      .lock                  held while a batch takes its number and is renamed in, and while a
                             build notes how far it reads
      RETIRED                the highest batch number retired (a decimal number and a newline)
      1.batch 2.batch ...    one batch a `tamis add` call, numbered in the order they landed
      ..batch.*.tmp          a batch being written: never read (`tamis.artifact.write_atomically`)

A batch takes the next number (one more than the highest present or retired) and is renamed into
place under the lock, so a build that lists the batches under the same lock and records the highest
number it read ("folded through N", in its artifact's provenance) knows that every batch it did not
read has a higher number: batches after N stay pending and are served on top of that version.

Batch file (all integers little-endian; FORMAT.md draws it):

    offset  size  field
    0       8     magic 89 54 41 4D 41 44 0D 0A ("\\x89TAMAD\\r\\n")
    8       2     major (1): a reader refuses any other
    10      2     minor (0): a reader of the same major reads any
    12      4     number of keys
    16      8     payload length in bytes
    24      8     xxh3-64 (seed 0) of bytes 0..23 followed by the payload
    32      ...   payload: each key as a 4-byte length, then its bytes

A reader accepts a file only when every field agrees with its length and the checksum matches, so
a torn or foreign file is refused, never half read. The same format holds the member list a build
keeps beside its artifact (`MEMBERS_NAME`), which a rollback reads.

A service holds the pending keys themselves (`PendingKeys`), so they add no false positive at all:
a key is "maybe" by addition only when its exact bytes were added. Only the standard library,
numpy and xxhash are used: the loader imports this module.
"""

from __future__ import annotations

import fcntl
import os
import struct
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import xxhash

from tamis.artifact import write_atomically
from tamis.errors import BadInput
from tamis.keylines import DEFAULT_MAX_KEY_BYTES
from tamis.query import PackedKeys, key_bytes, pack_batch
from tamis.store import POINTER_NAME, LEGACY_POINTER_NAME, is_version_name

FOLDER_NAME = "additions"
LOCK_NAME = ".lock"
RETIRED_NAME = "RETIRED"
BATCH_SUFFIX = ".batch"
# The member list a build keeps beside its artifact, in the batch format.
MEMBERS_NAME = "members.batch"

MAGIC = b"\x89TAMAD\r\n"  # high bit first and CR LF at the end: a text-mode copy is caught at once
MAJOR, MINOR = 1, 0
PREAMBLE = struct.Struct("<8sHHIQQ")  # magic, major, minor, keys, payload bytes, checksum
LENGTH = struct.Struct("<I")
# A retired-number file holds a version-like decimal number; anything longer is not read.
_RETIRED_MAX_BYTES = 32


class BatchError(ValueError):
    """A batch file that cannot be trusted: torn, foreign, or of an unknown major."""


# ---------------------------------------------------------------------------------------------------
# The batch format
# ---------------------------------------------------------------------------------------------------


def encode_batch(keys: list[bytes]) -> bytes:
    """The bytes of a batch file holding `keys`, in order."""
    payload = b"".join(LENGTH.pack(len(key)) + key for key in keys)
    head = PREAMBLE.pack(MAGIC, MAJOR, MINOR, len(keys), len(payload), 0)[:24]
    return head + struct.pack("<Q", xxhash.xxh3_64_intdigest(head + payload)) + payload


def decode_batch(data: bytes, where: str | os.PathLike) -> list[bytes]:
    """The keys of a batch file's bytes; BatchError naming `where` unless every check passes."""
    if len(data) < PREAMBLE.size:
        raise BatchError(f"{where}: {len(data)} bytes, shorter than a batch's {PREAMBLE.size}-byte preamble")
    magic, major, _minor, count, length, checksum = PREAMBLE.unpack_from(data)
    if magic != MAGIC:
        raise BatchError(f"{where}: not a tamis batch (magic {magic!r})")
    if major != MAJOR:
        raise BatchError(f"{where}: batch format {major}.x, this reader knows {MAJOR}.x; upgrade tamis")
    if length != len(data) - PREAMBLE.size:
        raise BatchError(f"{where}: the preamble gives {length} payload bytes, the file holds {len(data) - PREAMBLE.size}")
    if xxhash.xxh3_64_intdigest(data[:24] + data[PREAMBLE.size :]) != checksum:
        raise BatchError(f"{where}: checksum mismatch; the file is damaged")
    keys, at = [], PREAMBLE.size
    for _ in range(count):
        if at + LENGTH.size > len(data):
            raise BatchError(f"{where}: the payload ends inside key {len(keys) + 1} of {count}")
        (size,) = LENGTH.unpack_from(data, at)
        at += LENGTH.size
        if at + size > len(data):
            raise BatchError(f"{where}: the payload ends inside key {len(keys) + 1} of {count}")
        keys.append(data[at : at + size])
        at += size
    if at != len(data):
        raise BatchError(f"{where}: {len(data) - at} bytes follow the last of the {count} keys")
    return keys


def read_batch(path: Path) -> list[bytes]:
    try:
        data = path.read_bytes()
    except OSError as error:
        raise BatchError(f"{path}: cannot be read ({error.strerror})") from None
    return decode_batch(data, path)


def write_members(folder: Path, members: list[bytes]) -> None:
    """A build's member list, beside its artifact."""
    write_atomically(folder / MEMBERS_NAME, [encode_batch(members)])


def read_members(folder: Path) -> list[bytes] | None:
    """A version's member list; None for a version built before builds kept one."""
    path = folder / MEMBERS_NAME
    return read_batch(path) if path.is_file() else None


# ---------------------------------------------------------------------------------------------------
# The batches of a store
# ---------------------------------------------------------------------------------------------------


def folder_of(store: Path) -> Path:
    return store / FOLDER_NAME


def batch_number(name: str) -> int | None:
    """The number of a batch file's name ("12.batch" -> 12); None for any other name."""
    stem = name.removesuffix(BATCH_SUFFIX)
    return int(stem) if stem != name and is_version_name(stem) else None


def listed(store: Path) -> list[tuple[int, Path, int]]:
    """(number, path, inode) of every batch of the store, by number; none when there are none."""
    try:
        entries = list(os.scandir(folder_of(store)))
    except (FileNotFoundError, NotADirectoryError):
        return []
    found = [(batch_number(e.name), Path(e.path), e.inode()) for e in entries]
    return sorted((number, path, inode) for number, path, inode in found if number is not None)


def retired_through(store: Path) -> int:
    """The highest batch number retired; 0 when none was."""
    try:
        with open(folder_of(store) / RETIRED_NAME, "rb") as handle:
            text = handle.read(_RETIRED_MAX_BYTES).decode("ascii", errors="replace").strip()
    except FileNotFoundError:
        return 0
    if not is_version_name(text):
        raise BadInput(f"{folder_of(store) / RETIRED_NAME} holds {text!r}, not a batch number; write the highest retired number into it")
    return int(text)


@contextmanager
def additions_lock(store: Path) -> Iterator[Path]:
    """Hold the lock that orders batches (created with the folder when missing); yields the folder."""
    folder = folder_of(store)
    folder.mkdir(exist_ok=True)
    with open(folder / LOCK_NAME, "a+b") as handle:
        fcntl.flock(handle.fileno(), fcntl.LOCK_EX)
        try:
            yield folder
        finally:
            fcntl.flock(handle.fileno(), fcntl.LOCK_UN)


def require_store(store: Path) -> None:
    """BadInput unless `store` is a store folder: one with a version pointer, a version or batches."""
    if not store.is_dir():
        raise BadInput(f"no store at {store}: no such folder; check the path (a store is the folder a build publishes into)")
    marks = (POINTER_NAME, LEGACY_POINTER_NAME, FOLDER_NAME)
    if not any((store / mark).exists() for mark in marks) and not any(
        is_version_name(p.name) for p in store.iterdir()
    ):
        raise BadInput(f"{store} is not a tamis store (no {POINTER_NAME}, no version, no {FOLDER_NAME}/); check the path")


def checked_keys(keys: Iterable[str | bytes], max_key_bytes: int = DEFAULT_MAX_KEY_BYTES, where: str = "key") -> list[bytes]:
    """The keys as bytes, duplicates dropped; BadInput for an empty key, one over the length limit,
    or no key at all."""
    given = list(map(key_bytes, keys))
    if not given:
        raise BadInput("no keys to add; give keys as arguments, one a line on standard input, or with --file")
    for number, key in enumerate(given, start=1):
        if not key:
            raise BadInput(f"{where} {number} is empty; a member needs at least one byte (remove the empty line)")
        if len(key) > max_key_bytes:
            raise BadInput(
                f"{where} {number} is {len(key)} bytes, over the corpus limit of {max_key_bytes} (corpus.max_key_bytes); "
                f"shorten it, or pass the store's limit with --max-key-bytes"
            )
    return list(dict.fromkeys(given))


@dataclass(frozen=True)
class Batch:
    """A batch written: its number, its file and how many distinct keys it holds."""

    number: int
    path: Path
    keys: int


def add_keys(store: str | os.PathLike, keys: Iterable[str | bytes], max_key_bytes: int = DEFAULT_MAX_KEY_BYTES) -> Batch:
    """Record `keys` (str or bytes) as members of `store` now, as one whole batch: every service of
    the store answers "maybe" for them from its next refresh on, and the next build folds them in.
    Durable when it returns (written, flushed, renamed into place, the folder flushed); BadInput,
    with nothing recorded, for a store that is none or keys that cannot be members."""
    store = Path(store)
    require_store(store)
    unique = checked_keys(keys, max_key_bytes)
    data = encode_batch(unique)
    with additions_lock(store) as folder:
        present = [number for number, _, _ in listed(store)]
        number = max([retired_through(store), *present]) + 1
        path = folder / f"{number}{BATCH_SUFFIX}"
        write_atomically(path, [data])
    return Batch(number, path, len(unique))


# ---------------------------------------------------------------------------------------------------
# What a service holds: the keys added after the version it serves was built
# ---------------------------------------------------------------------------------------------------

# splitmix64's multipliers (common practice): odd 64-bit constants that spread every input bit
_MIX = (np.uint64(0x9E3779B97F4A7C15), np.uint64(0xBF58476D1CE4E5B9), np.uint64(0x94D049BB133111EB))
# _MASKS[n] keeps the low n bytes of a little-endian 64-bit word
_MASKS = np.array([(1 << (8 * n)) - 1 for n in range(8)] + [(1 << 64) - 1], dtype=np.uint64)
# The sieve has at least this many bits per pending key, so a key that was not added passes it
# with probability at most 1/64 and only then costs a set probe.
SIEVE_BITS_PER_KEY = 64


def sketch(packed: PackedKeys) -> np.ndarray:
    """A 64-bit mix of each key's length and first and last 8 bytes, in a few numpy passes over
    the keys (not their bytes): the sieve's index. In memory only, never stored: any change is safe."""
    offsets = packed.offsets
    starts, stops = offsets[:-1], offsets[1:]
    lengths = stops - starts
    padded = packed.buffer + bytes(8)
    # every byte offset read as an unaligned little-endian word (stride 1)
    words = np.ndarray(shape=(len(packed.buffer) + 1,), dtype="<u8", buffer=padded, strides=(1,))
    mask = _MASKS[np.minimum(lengths, 8)]
    head = words[starts] & mask
    tail = words[np.maximum(stops - 8, starts)] & mask
    mixed = (head * _MIX[0]) ^ ((tail + lengths.astype(np.uint64)) * _MIX[1])
    mixed ^= mixed >> np.uint64(31)
    return mixed * _MIX[2]


@dataclass(frozen=True, eq=False)
class PendingKeys:
    """The keys added after a version was built, held exactly, with the batches they came from
    (number -> inode) and a bit sieve that lets `mark` probe the set for few keys of a batch."""

    keys: frozenset[bytes]
    batches: dict[int, int]
    sieve: np.ndarray
    shift: np.uint64

    @classmethod
    def of(cls, keys: frozenset[bytes], batches: dict[int, int]) -> PendingKeys:
        log2_bits = max(10, int(len(keys) * SIEVE_BITS_PER_KEY).bit_length())
        sieve = np.zeros(1 << (log2_bits - 3), dtype=np.uint8)
        shift = np.uint64(64 - log2_bits)
        if keys:
            index = sketch(pack_batch(list(keys))) >> shift
            np.bitwise_or.at(sieve, index >> np.uint64(3), np.left_shift(np.uint8(1), (index & np.uint64(7)).astype(np.uint8)))
        return cls(keys, batches, sieve, shift)

    def mark(self, packed: PackedKeys, answers: np.ndarray) -> np.ndarray:
        """`answers` with True for every key of `packed` that was added."""
        if not self.keys:
            return answers
        index = sketch(packed) >> self.shift
        passed = (self.sieve[index >> np.uint64(3)] >> (index & np.uint64(7)).astype(np.uint8)) & 1
        buffer, offsets = packed.buffer, packed.offsets
        for i in np.flatnonzero(passed.astype(bool) & ~answers).tolist():
            if buffer[offsets[i] : offsets[i + 1]] in self.keys:
                answers[i] = True
        return answers

    def after(self, store: Path, through: int) -> PendingKeys:
        """These keys and those of the store's batches numbered above `through` not read yet (self
        when there are none); BatchError for a batch that cannot be trusted."""
        new = [(n, path, inode) for n, path, inode in listed(store) if n > through and self.batches.get(n) != inode]
        if not new:
            return self
        keys = set(self.keys)
        for _, path, _ in new:
            keys.update(read_batch(path))
        return PendingKeys.of(frozenset(keys), {**self.batches, **{n: inode for n, _, inode in new}})


NO_PENDING = PendingKeys.of(frozenset(), {})


def folded_through(header: dict) -> int:
    """How far the build of an artifact read the store's batches (0 for one built before additions)."""
    provenance = header.get("provenance")
    through = provenance.get("additions_through") if isinstance(provenance, dict) else None
    return through if type(through) is int and through >= 0 else 0
