"""Provenance of a build: when, from what corpus and config, by which tool version.

The build time is SOURCE_DATE_EPOCH when it is set (the reproducible-builds convention, common
practice), so the same corpus, config and seed give a byte-identical artifact (invariant 6).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import os
from pathlib import Path

import xxhash

from typing import TYPE_CHECKING

from tamis.version import tool_version
from tamis.config import BuildConfig

if TYPE_CHECKING:  # the corpus stage reads the build time from here
    from tamis.corpus import Corpus


def build_time() -> dt.datetime:
    epoch = os.environ.get("SOURCE_DATE_EPOCH")
    if epoch is not None:
        return dt.datetime.fromtimestamp(int(epoch), tz=dt.timezone.utc)
    return dt.datetime.now(tz=dt.timezone.utc).replace(microsecond=0)


def corpus_digest(corpus: Corpus) -> str:
    """xxh3-128 of every key and count, members first, then each non-member part in order."""
    digest = xxhash.xxh3_128()
    digest.update(b"\n".join(corpus.members))
    for part in corpus.non_member_parts:
        digest.update(b"\x00" + b"\n".join(part.keys))
        digest.update(part.counts.astype("<i8").tobytes())
    return digest.hexdigest()


def config_digest(config: BuildConfig) -> str:
    """xxh3-128 of the settings that shape the artifact. File paths and the column names they are
    read with (and the age of lookup sample files read) are left out, so moving or renaming a corpus or a store does not change the
    artifact's bytes, and so is [compute]: the chunk size and the machines a build runs on never
    change its result. So is gate.when_model_does_not_pay: it picks which of two artifacts ships
    (the learned one or the plain filter), and the other settings fix the bytes of each."""
    settings = dataclasses.asdict(config)
    settings.pop("compute")
    settings["gate"].pop("when_model_does_not_pay")
    reading = (("corpus", "members"), ("corpus", "non_members"), ("corpus", "key_column"), ("corpus", "count_column"),
               ("corpus", "sample_days"))  # which sample files are read: the corpus digest holds what they gave
    for section, key in (*reading, ("store", "path")):
        settings[section].pop(key)
    text = json.dumps(settings, sort_keys=True, default=lambda v: str(v) if isinstance(v, Path) else list(v))
    return xxhash.xxh3_128_hexdigest(text.encode())


def build_provenance(config: BuildConfig, corpus: Corpus) -> dict:
    built = build_time()
    corpus_id = corpus_digest(corpus)
    return {
        "built_at": built.isoformat().replace("+00:00", "Z"),
        "build_id": f"{built:%Y%m%dT%H%M%SZ}-{corpus_id[:8]}",
        "corpus_digest": corpus_id,
        "config_digest": config_digest(config),
        "tool_version": tool_version(),
    }
