"""Invariant 6: the same corpus, config and seed give a byte-identical artifact, in fresh processes."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import xxhash

from golden_build import build_golden
from test_golden import BUILD_EPOCH

SCRIPT = Path(__file__).with_name("golden_build.py")


def build_in_fresh_process(folder: Path) -> str:
    env = {**os.environ, "SOURCE_DATE_EPOCH": BUILD_EPOCH}
    done = subprocess.run([sys.executable, str(SCRIPT), str(folder)], env=env, capture_output=True, text=True, check=True)
    return done.stdout


def test_two_fresh_processes_build_the_same_bytes(tmp_path, monkeypatch):
    first, second = build_in_fresh_process(tmp_path / "a"), build_in_fresh_process(tmp_path / "b")
    assert (tmp_path / "a" / "golden.tamis").read_bytes() == (tmp_path / "b" / "golden.tamis").read_bytes()
    monkeypatch.setenv("SOURCE_DATE_EPOCH", BUILD_EPOCH)
    here = xxhash.xxh3_64_hexdigest(build_golden(tmp_path / "c").read_bytes())
    assert first == second == here


def test_the_build_time_comes_from_source_date_epoch(tmp_path, monkeypatch):
    # A different SOURCE_DATE_EPOCH changes the provenance and so the bytes: the time is really read.
    monkeypatch.setenv("SOURCE_DATE_EPOCH", str(int(BUILD_EPOCH) + 86_400))
    later = build_golden(tmp_path / "later").read_bytes()
    monkeypatch.setenv("SOURCE_DATE_EPOCH", BUILD_EPOCH)
    assert build_golden(tmp_path / "golden").read_bytes() != later
