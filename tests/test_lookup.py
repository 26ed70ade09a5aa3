"""`tamis lookup`: keys in and answers out as bytes, whatever the locale, in UTF-8 or raw-bytes mode.

The artifact holds members of both kinds: UTF-8 text with multi-byte characters, and raw bytes that
are not UTF-8 at all. Each test runs the command in a fresh process with the locale's text encoding
set to Latin-1 (PYTHONIOENCODING), under which a text reading of standard input changes the bytes of
every non-ASCII key.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys

import numpy as np
import pytest

from tamis.loader import open_filter
from tamis_testing import build_artifact, random_keys

TEXT_ALPHABET = "äöüßéλжガ_0123456789"
LATIN_1 = {"PYTHONIOENCODING": "latin-1"}


def _raw_keys(rng: np.random.Generator, count: int) -> list[bytes]:
    """Keys of 6 to 14 random bytes, none LF or NUL (an argument cannot hold NUL), none ending in CR,
    each with a byte that is never valid UTF-8 (0xFF)."""
    allowed = np.array([b for b in range(256) if b not in (0x00, 0x0A)], dtype=np.uint8)
    keys = []
    for length in rng.integers(6, 15, count).tolist():
        key = bytes(rng.choice(allowed, length)) + b"\xff" + bytes(rng.choice(allowed[allowed != 0x0D], 1))
        keys.append(key)
    return keys


@pytest.fixture(scope="module")
def keys() -> dict[str, list[bytes]]:
    rng = np.random.default_rng(11)
    text = sorted({k.encode("utf-8") for k in random_keys(rng, 300, TEXT_ALPHABET, 5, 10)})
    raw = sorted(set(_raw_keys(rng, 300)) - set(text))
    members = set(text) | set(raw)
    others = [k for k in dict.fromkeys(random_keys(rng, 4000, "abcdefghijklmnopqrstuvwxyz", 5, 10)) if k.encode() not in members]
    return {"text": text, "raw": raw, "non_members": [k.encode() for k in others]}


@pytest.fixture(scope="module")
def artifact(tmp_path_factory, keys):
    path = tmp_path_factory.mktemp("lookup") / "artifact.tamis"
    half = len(keys["non_members"]) // 2
    train, validation = keys["non_members"][:half], keys["non_members"][half:]
    build_artifact(path, (keys["text"] + keys["raw"], train, np.ones(len(train)), validation, np.ones(len(validation))), 0.001, 3)
    return path


def lookup(*args, stdin: bytes = b"") -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "tamis.cli", "lookup", *args], input=stdin, capture_output=True,
                          env={**os.environ, **LATIN_1}, timeout=120)


def answered(keys: list[bytes], answer: bytes) -> bytes:
    return b"".join(key + b"\t" + answer + b"\n" for key in keys)


def test_the_filter_tells_members_from_others(artifact, keys):
    loaded = open_filter(artifact)
    assert loaded.contains_many(keys["text"] + keys["raw"]).all()
    assert loaded.contains_many(keys["non_members"]).mean() < 0.05  # a real filter, not one that says yes to all


def test_utf8_members_read_from_stdin_answer_maybe_whatever_the_locale(artifact, keys):
    done = lookup(str(artifact), stdin=b"".join(k + b"\n" for k in keys["text"]))
    assert done.returncode == 0, done.stderr
    assert done.stdout == answered(keys["text"], b"maybe")


def test_windows_line_ends_end_a_text_line(artifact, keys):
    done = lookup(str(artifact), stdin=b"".join(k + b"\r\n" for k in keys["text"][:20]))
    assert done.stdout == answered(keys["text"][:20], b"maybe")


def test_raw_bytes_members_from_stdin_and_from_arguments_answer_maybe(artifact, keys):
    done = lookup("--key-encoding", "bytes", str(artifact), stdin=b"\n".join(keys["raw"]))  # no final LF
    assert done.returncode == 0, done.stderr
    assert done.stdout == answered(keys["raw"], b"maybe")
    arguments = keys["raw"][:10] + keys["text"][:5]
    done = lookup("--key-encoding", "bytes", str(artifact), *map(os.fsdecode, arguments))
    assert done.returncode == 0, done.stderr
    assert done.stdout == answered(arguments, b"maybe")


def test_non_members_answer_no_with_their_bytes_as_given(artifact, keys):
    sample = keys["non_members"][:200]
    done = lookup(str(artifact), stdin=b"\n".join(sample))
    lines = done.stdout.splitlines()
    assert [line.rsplit(b"\t", 1)[0] for line in lines] == sample
    assert sum(line.endswith(b"\tno") for line in lines) > 150


@pytest.mark.parametrize(
    "mode, stdin, message",
    [
        ("bytes", b"fine\nends_in_cr\r\n", b"standard input: line 2 ends in a carriage return"),
        ("utf-8", b"fine\nalso fine\n\xff\xfe\n", b"standard input: line 3 is not valid UTF-8 .*--key-encoding bytes"),
    ],
)
def test_what_a_line_cannot_carry_is_refused_with_its_line(artifact, mode, stdin, message):
    done = lookup("--key-encoding", mode, str(artifact), stdin=stdin)
    assert done.returncode == 2 and done.stdout == b""
    assert re.search(message, done.stderr), done.stderr
