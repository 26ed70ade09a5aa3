"""Golden bytes: a tiny fixed corpus built stage by stage gives an artifact with a pinned digest.

If this test fails, the bytes of an artifact changed for the same inputs: the container layout,
the header, the feature values, the trees LightGBM grows, the region plan or the filters. When
the change is deliberate, bump FORMAT_MINOR or FORMAT_MAJOR (pipeline/format.py) or
FEATURES_VERSION as the change requires, and record the new digest here.

The trees LightGBM grows may change between its releases (the project allows several), so the
digest is checked only under the LightGBM and numpy the digest was recorded with, and skipped,
saying so, elsewhere; tests/test_golden_parts.py pins every part that depends on no trained model
(features, a hand-written forest's scores, both filter kinds, a whole artifact) everywhere.
"""

from __future__ import annotations

import pytest
import xxhash

from golden_build import build_golden
from tamis.loader import open_filter

# SOURCE_DATE_EPOCH for the build time: 2026-12-01T00:00:00Z.
BUILD_EPOCH = "1796083200"
# xxh3-64 of the artifact, recorded with LightGBM 4.7.0 and numpy 2.4 (format 2.2, with a fuse region and
# provenance.additions_through, not verified so without verified_paths; region boundaries priced by the
# filters' real bytes; gate.max_unlike_rate in the config digest; efdc4b14688cca54 as format 2.1,
# d7b2b265aea6cb7f as format 2.0).
GOLDEN_DIGEST = "9d3b239854df1a8a"
RECORDED_WITH = {"lightgbm": "4.7.0", "numpy": "2.4"}


def _versions() -> dict:
    import lightgbm
    import numpy

    return {"lightgbm": lightgbm.__version__, "numpy": ".".join(numpy.__version__.split(".")[:2])}


def test_the_fixed_build_has_the_golden_digest(tmp_path, monkeypatch):
    if _versions() != RECORDED_WITH:
        pytest.skip(f"the digest was recorded with {RECORDED_WITH}, this is {_versions()}: LightGBM may grow other "
                    f"trees (tests/test_golden_parts.py holds the parts that depend on no model)")
    monkeypatch.setenv("SOURCE_DATE_EPOCH", BUILD_EPOCH)
    path = build_golden(tmp_path)
    loaded = open_filter(path)
    # the build is only worth pinning if it holds a forest, a Bloom filter and a binary fuse filter
    assert loaded.forest.trees > 0
    assert {"bloom", "fuse"} <= {region["mode"] for region in loaded.info["regions"]}
    assert loaded.info["provenance"]["built_at"] == "2026-12-01T00:00:00Z"
    assert xxhash.xxh3_64_hexdigest(path.read_bytes()) == GOLDEN_DIGEST
