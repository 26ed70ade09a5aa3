"""Package stage: the feature spec, the compiled forest, the regions and their filters in one artifact.

Header (the container's meta map, see `tamis.artifact`; FORMAT.md specifies every field):

    kind          "membership-filter"
    provenance    whatever the build records (build time, input digests, tool version, ...)
    feature_spec  the spec `tamis.features.featurize` runs with
    forest        `Forest.meta()`; the forest's arrays are the "forest.*" sections
    boundaries    k - 1 ascending integer scores; region i holds boundaries[i-1] <= s < boundaries[i]
    regions       k maps {mode, bits, hashes, members, fpr_budget, section}; section names the
                  uint64 array of a "bloom" or "fuse" region and is None for "yes" and "no". A
                  "fuse" region (format 2.0 on) adds {width, seed, segment_length, segment_count}
                  and its hashes is its arity (3 or 4); see `tamis.fuse` for how it is read
    hash          {function, positions, bit_order, seed}: how keys become Bloom bit positions
                  (a fuse region derives its slots from the same xxh3_128 value, `tamis.fuse`)
    measured      the held-out figures once verification has run, None before
    verified_paths  the query paths verification answered every member through (from 2.2), once it has run

A key is answered by: features -> integer score -> region by the boundaries -> that region's filter.
"""

from __future__ import annotations

import os
from typing import Any, Mapping, Sequence

import numpy as np

from tamis.artifact import write_artifact
from tamis.bloom import check_seed
from tamis.filters import RegionFilter
from tamis.format import HASHING, HEADER_KIND, VERIFIED_PATHS_FIELD, filter_section_name
from tamis.trees import Forest

INT64_RANGE = (-(2**63), 2**63 - 1)


def _boundary_list(boundaries: Sequence[int] | np.ndarray) -> list[int]:
    values = np.asarray(boundaries)
    if values.ndim != 1 or (len(values) and not np.issubdtype(values.dtype, np.integer)):
        raise ValueError(
            f"boundaries must be a 1-d sequence of integer scores, got {values.dtype} of shape {values.shape}"
        )
    listed = [int(v) for v in values]
    if any(not INT64_RANGE[0] <= v <= INT64_RANGE[1] for v in listed):
        raise ValueError("boundaries must fit in int64")
    if any(a > b for a, b in zip(listed, listed[1:])):
        raise ValueError(f"boundaries must be ascending, got {listed}")
    return listed


def _region_entry(index: int, region: RegionFilter, hash_seed: int) -> dict[str, Any]:
    fuse_fields = {}
    if region.mode == "bloom":
        region.bloom(hash_seed)  # checks bits, probes and word count agree
        section = filter_section_name(index)
    elif region.mode == "fuse":
        fuse = region.fuse(hash_seed)  # checks arity, width, layout and word count agree
        section = filter_section_name(index)
        fuse_fields = {"width": fuse.width, "seed": fuse.seed, "segment_length": fuse.segment_length,
                       "segment_count": fuse.segment_count}
    elif region.mode in ("yes", "no"):
        if region.words.size:
            raise ValueError(f"region {index} is in mode {region.mode!r} but carries {region.words.size} words")
        section = None
    else:
        raise ValueError(f"region {index} has unknown mode {region.mode!r}")
    return {
        "mode": region.mode,
        "bits": region.bits,
        "hashes": region.hashes,
        "members": region.members,
        "fpr_budget": float(region.fpr_budget),
        "section": section,
        **fuse_fields,
    }


def package_artifact(
    path: str | os.PathLike,
    *,
    feature_spec: Mapping[str, Any],
    forest: Forest,
    boundaries: Sequence[int] | np.ndarray,
    region_filters: Sequence[RegionFilter],
    hash_seed: int,
    provenance: Mapping[str, Any],
    measured: Mapping[str, Any] | None = None,
    verified_paths: Sequence[str] = (),
) -> None:
    """Write the artifact for these parts to path (atomically; equal inputs give equal bytes).
    `verified_paths`: the query paths the verify stage answered every member through (none before it runs)."""
    listed = _boundary_list(boundaries)
    if len(region_filters) != len(listed) + 1:
        raise ValueError(f"{len(listed)} boundaries make {len(listed) + 1} regions, got {len(region_filters)} filters")
    check_seed(hash_seed)
    regions = [_region_entry(i, region, hash_seed) for i, region in enumerate(region_filters)]
    sections = dict(forest.sections())
    for index, region in enumerate(region_filters):
        if region.mode in ("bloom", "fuse"):
            sections[filter_section_name(index)] = region.words
    header = {
        "kind": HEADER_KIND,
        "provenance": dict(provenance),
        "feature_spec": dict(feature_spec),
        "forest": forest.meta(),
        "boundaries": listed,
        "regions": regions,
        "hash": {**HASHING, "seed": hash_seed},
        "measured": None if measured is None else dict(measured),
    }
    if verified_paths:
        header[VERIFIED_PATHS_FIELD] = list(verified_paths)
    write_artifact(path, header, sections)
