"""The constants of the artifact format, in one place: the writer (`tamis.artifact`, `tamis.package`)
and the reader (`tamis.artifact`, `tamis.loader`) both take them from here. FORMAT.md, beside the
README, specifies the format around them; tests/test_format.py holds a format-1.0 file every reader
must answer identically.

Changing any value here changes the bytes a build writes or the files a reader accepts: a change a
reader of the current major can ignore (a new header field, a new section) bumps FORMAT_MINOR, any
other change bumps FORMAT_MAJOR.
"""

from __future__ import annotations

import struct

import numpy as np

# ---------------------------------------------------------------------------------------------------
# The container (tamis.artifact)
# ---------------------------------------------------------------------------------------------------

# The first byte has the high bit set and the magic ends in CR LF, so a 7-bit or newline-translating
# copy is caught at once (common practice for binary formats).
MAGIC = b"\x89TAMIS\r\n"
# Written as 2.0: a region may hold a binary fuse filter, which a 1.x reader cannot ignore (it would
# have to answer its keys). Files of every major in READABLE_MAJORS are still read.
# 2.1 adds the optional provenance field additions_through (how far the build read the store's
# addition batches, tamis.additions), which a 2.0 reader ignores.
# 2.2 adds the optional header field verified_paths (VERIFIED_PATHS_FIELD), which a 2.1 reader ignores.
FORMAT_MAJOR = 2
FORMAT_MINOR = 2
READABLE_MAJORS = (1, 2)
# magic, major, minor, header length, header checksum, 8 reserved bytes (zero), all little-endian.
PREAMBLE = struct.Struct("<8sHHIQ8x")
# Sections start at multiples of 64 bytes: a cache line, and a multiple of every dtype's size.
ALIGNMENT = 64
# The header is metadata only; anything larger belongs in a section. Checked before reading it.
MAX_HEADER_BYTES = 1 << 20
# The deepest nesting of maps and lists a header may have. Ours nest 4 deep (meta, regions, a
# region, its fields); the bound keeps every walk over a hostile header short and far from
# Python's recursion limit (a header of 546 bytes can nest lists 494 deep). The header's bytes
# bound the number of values, so with this every check of the header is bounded in work too.
MAX_HEADER_DEPTH = 32
# The most sections a table may list: ours hold the forest's 6 and one a backup filter.
MAX_SECTIONS = 4096
ALLOWED_DTYPES = frozenset({"|u1", "|i1", "<u2", "<i2", "<u4", "<i4", "<u8", "<i8", "<f4", "<f8"})

# ---------------------------------------------------------------------------------------------------
# The membership filter's header (tamis.package writes it, tamis.loader reads it)
# ---------------------------------------------------------------------------------------------------

HEADER_KIND = "membership-filter"
# How keys become Bloom bit positions (tamis.bloom; a fuse region reads the same xxh3-128 value,
# tamis.fuse); a loader refuses any other description.
HASHING = {"function": "xxh3_128", "positions": "enhanced-double-hashing", "bit_order": "lsb0-u64-le"}
# How a region answers: by its Bloom filter, by its binary fuse filter (from 2.0), always yes, always
# no; the modes a file of each major may hold.
REGION_MODES = ("bloom", "fuse", "yes", "no")
REGION_MODES_OF_MAJOR = {1: ("bloom", "yes", "no"), 2: REGION_MODES}
# Seeds of xxh3 are 64-bit.
SEED_LIMIT = 2**64
# The query paths ("numpy", "compiled": tamis.query) through whose batch and single-key calls the
# build's verify stage answered every member: a loader answers on no other path by default. Written
# with the measured figures, after verification; absent before 2.2 and before verification.
VERIFIED_PATHS_FIELD = "verified_paths"


def filter_section_name(region: int) -> str:
    """Name of the section holding region's bit array."""
    return f"filter.{region}"


# ---------------------------------------------------------------------------------------------------
# Features (tamis.features)
# ---------------------------------------------------------------------------------------------------

# The version of the feature definitions; the feature spec in the header names it.
FEATURES_VERSION = 1

# ---------------------------------------------------------------------------------------------------
# The forest (tamis.trees)
# ---------------------------------------------------------------------------------------------------

FOREST_SECTION_PREFIX = "forest."
FOREST_SECTION_NAMES = ("tree_splits", "feature", "threshold", "left", "right", "value")
FOREST_META_KEYS = ("features", "trees", "scale", "bias")
TREE_SPLITS_DTYPES = tuple(np.dtype(t).newbyteorder("<") for t in ("u1", "u2", "u4"))
FEATURE_DTYPE = np.dtype("<u1")
THRESHOLD_DTYPE = np.dtype("<f4")
CHILD_DTYPES = tuple(np.dtype(t).newbyteorder("<") for t in ("i1", "i2", "i4"))
VALUE_DTYPES = tuple(np.dtype(t).newbyteorder("<") for t in ("i2", "i4"))
# Scores fit a signed 32-bit accumulator: |bias| plus the largest |leaf value| of every tree must
# stay below 2^31, so an implementation that sums in int32 gets the same answer as our int64 sum.
INT32_LIMIT = 2**31 - 1
# The most leaves a tree may have: the model stage never grows more, and the bound keeps a hostile
# file's tree walks short (depth < 64).
MAX_TREE_LEAVES = 64
# The most trees a forest may have: the model stage grows at most this many (its max_trees), and
# with MAX_TREE_LEAVES it bounds a query's node tests (at most 6.3 million) whatever a file says.
MAX_TREES = 100_000

# ---------------------------------------------------------------------------------------------------
# Bloom filters (tamis.bloom)
# ---------------------------------------------------------------------------------------------------

WORD_BITS = 64
# x + y < 2m must fit in a uint64 (see the probing loop in tamis.bloom).
MAX_BLOOM_BITS = 2**63
# k = log2(1/f) at the optimum, so 64 probes already reach f = 2^-64; more is never sized, and the
# cap keeps a hostile stored value from making one query loop for long.
MAX_BLOOM_HASHES = 64
