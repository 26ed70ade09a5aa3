"""Counts of members answered "no" on the paths a service has, for the code the venv imports.

    python benchmarks/false_no_paths.py      # from the repository's root (it imports tests/tamis_testing)

Every count must be 0 (or the input refused with a clear error); run it with an older checkout's
code on the path to see what that code did.

Builds small artifacts with the stage functions (tests/tamis_testing.build_artifact), 3,000 members
each, and counts members answered "no":
  1. raw-bytes members, a third ending in 0x0D, read from a line file in bytes mode;
  2. UTF-8 members (non-ASCII) through `tamis lookup` under PYTHONIOENCODING=latin-1;
  3. after the artifact file is rewritten in place (zeros, same length), and after a truncation;
Path 4 (verify) is measured by tests/test_verify.py (a broken single-key path refused or not).
"""

import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import polars as pl

sys.path.insert(0, str(Path.cwd() / "tests"))
from tamis_testing import build_artifact  # noqa: E402

from tamis.config import CorpusSettings  # noqa: E402
from tamis.corpus import read_source  # noqa: E402
from tamis.errors import BadInput  # noqa: E402
from tamis.loader import open_filter  # noqa: E402

MEMBERS = 3000
rng = np.random.default_rng(2026)
work = Path(tempfile.mkdtemp(prefix="false-no-"))


def non_members(count: int) -> list[bytes]:
    letters = np.frombuffer(b"abcdefghijklmnopqrstuvwxyz", dtype=np.uint8)
    return list(dict.fromkeys(bytes(rng.choice(letters, int(n))) for n in rng.integers(5, 11, count)))


def build(members: list[bytes], name: str) -> Path:
    others = [k for k in non_members(8000) if k not in set(members)]
    half = len(others) // 2
    path = work / name
    build_artifact(path, (members, others[:half], np.ones(half), others[half:], np.ones(len(others) - half)), 0.01, 3)
    return path


def count_no(path: Path, keys: list[bytes]) -> tuple[int, int]:
    loaded = open_filter(path)
    return int((~loaded.contains_many(keys)).sum()), sum(not loaded.contains(k) for k in keys)


# 1. raw bytes, a third ending in CR
allowed = np.array([b for b in range(256) if b not in (0x0A, 0x0D)], dtype=np.uint8)
raw = list(dict.fromkeys(bytes(rng.choice(allowed, int(n))) for n in rng.integers(6, 13, MEMBERS)))[:MEMBERS]
raw = [k + b"\r" if i % 3 == 0 else k for i, k in enumerate(raw)]
lines = work / "raw.bin"
lines.write_bytes(b"".join(k + b"\n" for k in raw))
try:
    read = read_source(lines, CorpusSettings(key_encoding="bytes"), want_counts=False).keys
    artifact = build(read, "raw.tamis")
    ending_in_cr = sum(k.endswith(b"\r") for k in raw)
    print(f"1. bytes-mode line file: {ending_in_cr} keys end in CR; members answered no "
          f"(contains_many, contains): {count_no(artifact, raw)}")
except BadInput as exc:
    print(f"1. bytes-mode line file refused: {str(exc)[:160]}...")
    table = work / "raw.parquet"
    pl.DataFrame({"key": pl.Series(raw, dtype=pl.Binary)}).write_parquet(table)
    read = read_source(table, CorpusSettings(key_encoding="bytes"), want_counts=False).keys
    print(f"   the same keys from a Parquet binary column: members answered no {count_no(build(read, 'raw-pq.tamis'), raw)}")

# 2. lookup under a Latin-1 locale
text_alphabet = "äöüßéλжガ_0123456789"
text = list(dict.fromkeys("".join(rng.choice(list(text_alphabet), int(n))).encode() for n in rng.integers(5, 11, MEMBERS)))
artifact = build(text, "text.tamis")
done = subprocess.run([sys.executable, "-m", "tamis.cli", "lookup", str(artifact)], input=b"\n".join(text) + b"\n",
                      capture_output=True, env={**os.environ, "PYTHONIOENCODING": "latin-1"})
answers = done.stdout.splitlines()
said_no = sum(a.endswith(b"\tno") for a in answers)
print(f"2. tamis lookup, PYTHONIOENCODING=latin-1: {said_no} of {len(text)} "
      f"UTF-8 members answered no (exit {done.returncode})")

# 3. rewrite in place, truncate in place
served = work / "served.tamis"
served.write_bytes(artifact.read_bytes())
loaded = open_filter(served)
with open(served, "r+b") as handle:
    handle.write(bytes(served.stat().st_size))
print(f"3. rewritten in place after open: {int((~loaded.contains_many(text)).sum())} of {len(text)} members answered no")
served.write_bytes(artifact.read_bytes())
script = ("import os, sys; from tamis.loader import open_filter; f = open_filter(sys.argv[1]); os.truncate(sys.argv[1], 0); "
          "keys = sys.stdin.buffer.read().split(b'\\n'); print(int((~f.contains_many(keys)).sum()))")
done = subprocess.run([sys.executable, "-c", script, str(served)], input=b"\n".join(text), capture_output=True)
print(f"   truncated in place after open: exit {done.returncode}, members answered no: {done.stdout.decode().strip() or '-'}")
