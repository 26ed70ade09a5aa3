"""End to end through the command line: a small Emberfall demo is built, verified and published,
then reloaded in a fresh process and queried; a refused build and bad input keep the store as it was."""

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from tamis import compiled, publish
from tamis.loader import open_filter
from tamis.query import available_paths, default_path

# Small enough for the suite. Lookup counts are heavy-tailed, so 24,000 held-out keys carry the
# information of only about 500 unweighted draws: a 5% target can be bounded at that size, 1% not.
MEMBERS, NON_MEMBERS, TARGET = 6000, 80000, "0.05"


def tamis(*args: str, stdin: str | None = None, env: dict | None = None) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "tamis.cli", *args],
        input=stdin, capture_output=True, text=True, env={**os.environ, **(env or {})}, timeout=600,
    )


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Path:
    directory = tmp_path_factory.mktemp("emberfall")
    done = tamis("demo", "--dir", str(directory), "--members", str(MEMBERS), "--non-members", str(NON_MEMBERS),
                 "--target-fpr", TARGET)
    assert done.returncode == 0, done.stderr
    assert "published version 1" in done.stdout
    return directory


def _report(demo: Path) -> dict:
    return json.loads((demo / "store" / "1" / publish.REPORT_NAME).read_text())


def test_demo_publishes_a_verified_artifact_that_meets_its_target(demo):
    report = _report(demo)
    assert report["gate"]["passed"] is True and report["gate"]["reasons"] == []
    assert all(check["passed"] for check in report["gate"]["checks"])
    assert report["false_negatives"] == 0
    assert report["heldout"]["fpr"] <= report["target_fpr"]
    assert report["heldout"]["fpr_upper"] <= report["target_fpr"]
    assert report["corpus"]["members"] == MEMBERS
    assert report["size"]["total_bytes"] == (demo / "store" / "1" / publish.ARTIFACT_NAME).stat().st_size
    # at this small size the fixed costs (header, model) are a large share of the file, so the
    # whole-file ratio is not asserted here; the backup filters alone must beat a plain Bloom filter
    assert report["baseline"]["ratio"] == report["size"]["total_bytes"] / report["baseline"]["bloom_bytes"]
    assert report["size"]["filter_bytes"] < report["baseline"]["bloom_bytes"]
    assert report["size"]["total_bytes"] >= report["size"]["model_bytes"] + report["size"]["filter_bytes"]
    assert sum(r["members"] for r in report["regions"]) == MEMBERS
    assert set(report["timings"]) >= {"corpus", "features", "model", "regions", "filters", "package", "verify"}
    assert publish.current_version(demo / "store") == 1


_FRESH = """
import sys
from tamis.loader import open_filter
members = open(sys.argv[2], encoding="utf-8").read().splitlines()
opened = open_filter(sys.argv[1])
answers = opened.contains_many(members)
print(int(answers.sum()), len(members), opened.answer_path, ",".join(opened.verified_paths))
"""


def test_a_fresh_process_reloads_the_artifact_and_finds_every_member(demo):
    artifact = demo / "store" / "1" / publish.ARTIFACT_NAME
    done = subprocess.run([sys.executable, "-c", _FRESH, str(artifact), str(demo / "banned_handles.txt")],
                          capture_output=True, text=True, check=True)
    found, total, answer_path, verified = done.stdout.split()
    assert int(found) == int(total) == MEMBERS
    # the build verified every path this machine has, said so in the header, and a service answers on the fastest
    assert verified.split(",") == list(available_paths()) == _report(demo)["answer_paths"]["verified_paths"]
    assert answer_path == default_path()


def test_a_build_without_the_compiled_path_says_so_and_its_services_stay_on_numpy(tmp_path):
    if not compiled.ENABLED:
        pytest.skip("numba is not installed here: the demo build above is the build without it")
    done = tamis("demo", "--dir", str(tmp_path), "--members", "1500", "--non-members", "40000", "--target-fpr", "0.1",
                 env={compiled.NUMPY_ONLY_VARIABLE: "1"})
    assert done.returncode == 0, done.stderr
    assert "NOT VERIFIED: the compiled path (TAMIS_NUMPY_ONLY is set)" in done.stdout
    report = json.loads((tmp_path / "store" / "1" / publish.REPORT_NAME).read_text())
    assert report["answer_paths"]["verified_paths"] == ["numpy"]
    opened = open_filter(tmp_path / "store" / "1" / publish.ARTIFACT_NAME)
    assert (opened.verified_paths, opened.answer_path) == (("numpy",), "numpy")


def test_lookup_answers_every_member_maybe_in_input_order(demo):
    members = (demo / "banned_handles.txt").read_text(encoding="utf-8").splitlines()
    done = tamis("lookup", str(demo / "store"), stdin="\n".join(members) + "\n")
    assert done.returncode == 0, done.stderr
    lines = done.stdout.splitlines()
    assert lines == [f"{key}\tmaybe" for key in members]


def test_show_prints_regions_and_the_measured_rate(demo):
    done = tamis("show", str(demo / "store"))
    assert done.returncode == 0, done.stderr
    assert "measured on" in done.stdout and "region" in done.stdout and "report:" in done.stdout


def test_a_build_the_gate_refuses_keeps_the_current_version(demo, tmp_path):
    config = tmp_path / "tight.toml"
    config.write_text("[gate]\nmax_artifact_bytes = 100\n")
    done = tamis("build", str(config), "--members", str(demo / "banned_handles.txt"),
                 "--non-members", str(demo / "lookups.parquet"), "--target-fpr", TARGET, "--store", str(demo / "store"))
    assert done.returncode == 1, done.stderr
    assert "max_artifact_bytes" in done.stdout
    assert publish.current_version(demo / "store") == 1
    refused = list((demo / "store" / "refused").glob("*/report.json"))
    assert len(refused) == 1
    report = json.loads(refused[0].read_text())
    assert report["gate"]["passed"] is False
    # a refused build still measures the version in service: the same corpus as version 1, so it
    # misses no member and scores its own held-out rate again
    drift = report["drift"]
    assert drift["status"] == "evaluated" and drift["current_version"] == 1 and drift["members_missed"] == 0
    assert drift["heldout_fpr"] == _report(demo)["heldout"]["fpr"]
    assert "in service when built: version 1, which misses 0 of today's members" in done.stdout


def test_bad_input_exits_2_with_one_line_and_writes_nothing(demo, tmp_path):
    before = sorted(p.name for p in (demo / "store").iterdir())
    # the CLI's own quiet Prefect level, as a user gets it (conftest sets a louder one)
    done = tamis("build", "--members", str(tmp_path / "absent.txt"), "--non-members", str(demo / "lookups.parquet"),
                 "--target-fpr", "0.01", "--store", str(demo / "store"), env={"PREFECT_LOGGING_LEVEL": "CRITICAL"})
    assert done.returncode == 2
    assert done.stderr.strip().count("\n") == 0 and "absent.txt" in done.stderr
    assert sorted(p.name for p in (demo / "store").iterdir()) == before


def test_the_report_page_sits_beside_the_report_and_show_names_it(demo):
    page = demo / "store" / "1" / "report.html"
    assert page.is_file() and page.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    done = tamis("show", str(demo / "store"))
    assert f"report page: {page}" in done.stdout


def test_help_lists_every_command():
    done = tamis("--help")
    for command in ("demo", "build", "lookup", "show", "versions", "rollback", "schedule"):
        assert command in done.stdout
