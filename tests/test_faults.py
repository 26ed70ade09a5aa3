"""Faults: builds killed with SIGKILL at every stage and every change to the store, a full disk
while writing, and two builds racing on one store. After each, the store holds a complete version
in service and the next build succeeds without any clean-up by hand (invariant 4)."""

from __future__ import annotations

import builtins
import errno
import io
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tamis import publish, report_page
from tamis.loader import open_filter
from tamis_testing import SMALL_CONFIG_TOML, plain_build_flow, small_config, snapshot, write_small_corpus

TESTS = Path(__file__).resolve().parent
TARGET = 0.05
# What a build may leave only while it runs: none of it may survive the next build.
LEFTOVER_PATTERNS = (".staging-*", ".removing-*", ".IN_SERVICE.*.tmp")


@pytest.fixture(scope="module")
def corpus(tmp_path_factory) -> tuple[Path, Path]:
    return write_small_corpus(tmp_path_factory.mktemp("corpus"))


def members_of(path: Path) -> list[str]:
    return path.read_text(encoding="utf-8").splitlines()


def assert_serves_every_member(store: Path, members: list[str]) -> int:
    """IN_SERVICE names a published version whose artifact opens and answers every member; every
    other published version opens too. Returns the current version."""
    current = publish.current_version(store)
    assert current in publish.published_versions(store), f"IN_SERVICE names {current}, not a published version"
    for version in publish.published_versions(store):
        artifact = open_filter(store / str(version) / publish.ARTIFACT_NAME)
        assert artifact.contains_many(members).all(), f"version {version} misses a member"
    return current


def assert_no_leftovers(store: Path) -> None:
    left = [p.name for pattern in LEFTOVER_PATTERNS for p in store.glob(pattern)]
    left += [str(p.relative_to(store)) for p in store.rglob("*.tmp")]
    assert not left, f"left in the store: {left}"


def run_fault_runner(mode: str, plan: dict, work: Path) -> dict:
    work.mkdir(parents=True, exist_ok=True)
    plan_path, results_path = work / "plan.json", work / "results.json"
    plan_path.write_text(json.dumps({**plan, "work": str(work)}))
    done = subprocess.run([sys.executable, str(TESTS / "fault_runner.py"), mode, str(plan_path), str(results_path)],
                          capture_output=True, text=True, timeout=540)
    assert done.returncode == 0, done.stderr[-3000:]
    return json.loads(results_path.read_text())


# --- a full disk --------------------------------------------------------------------------------


class FullDisk:
    """Files opened for writing whose name contains `fragment` fail their first write with ENOSPC."""

    def __init__(self, fragment: str):
        self.fragment = fragment
        self.real_open = builtins.open
        self.failed: list[str] = []

    def open(self, file, mode="r", *args, **kwargs):
        handle = self.real_open(file, mode, *args, **kwargs)
        if any(c in mode for c in "wxa+") and self.fragment in os.fsdecode(file):
            disk = self

            class Full:
                def write(self, data):
                    disk.failed.append(os.fsdecode(file))
                    raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), os.fsdecode(file))

                def __enter__(self):
                    return self

                def __exit__(self, *exc):
                    handle.close()

                def __getattr__(self, name):
                    return getattr(handle, name)

            return Full()
        return handle


def _raised_errno(error: BaseException) -> int | None:
    """The errno of the first OSError in an exception's chain."""
    while error is not None:
        if isinstance(error, OSError):
            return error.errno
        error = error.__cause__ or error.__context__
    return None


@pytest.fixture(scope="module")
def published_store(corpus, tmp_path_factory) -> Path:
    """A store with version 1 published, built in this process without Prefect from the members and
    one more (a build of the corpus then has inputs of its own: identical ones would publish nothing)."""
    store = tmp_path_factory.mktemp("published") / "store"
    first = store.parent / "first-members.txt"
    first.write_text(corpus[0].read_text(encoding="utf-8") + "version_one_only_member\n", encoding="utf-8")
    with plain_build_flow() as build:
        assert build(small_config(first, corpus[1], store, target=TARGET)).published
    return store


@pytest.mark.parametrize("fragment", [".artifact.tamis.", ".report.json.", ".report.html.", ".IN_SERVICE."])
def test_a_full_disk_while_writing_leaves_the_store_as_it_was(corpus, published_store, tmp_path, monkeypatch, fragment):
    store = tmp_path / "store"
    shutil.copytree(published_store, store)
    before = snapshot(store)
    disk = FullDisk(fragment)
    monkeypatch.setattr(builtins, "open", disk.open)
    monkeypatch.setattr(io, "open", disk.open)
    # the page's charts take most of a small build and write nothing of their own
    monkeypatch.setattr(report_page, "draw_figures", lambda report, scores: {})
    with plain_build_flow() as build, pytest.raises(Exception) as raised:
        build(small_config(*corpus, store, target=TARGET))
    monkeypatch.undo()
    assert disk.failed, f"no write to a {fragment} file was attempted"
    assert _raised_errno(raised.value) == errno.ENOSPC
    assert snapshot(store) == before
    with plain_build_flow() as build:
        assert build(small_config(*corpus, store, target=TARGET)).version == 2


# --- two builds at once -------------------------------------------------------------------------


def test_two_builds_at_once_publish_one_at_a_time_and_the_older_export_never_replaces_the_newer(tmp_path):
    corpora = [write_small_corpus(tmp_path / name, seed=seed) for name, seed in (("a", 11), ("b", 12))]
    older = corpora[0][0].stat().st_mtime - 60
    os.utime(corpora[0][0], (older, older))  # a's members export is the older one
    store = tmp_path / "store"
    results = run_fault_runner("race", {"corpora": [[str(m), str(n)] for m, n in corpora], "store": str(store),
                                        "target": TARGET}, tmp_path / "race")
    assert {r["status"] for r in results.values()} == {"exit 0"}, results
    a, b = results["a"]["outcome"], results["b"]["outcome"]
    if a["published"]:  # the older export first: the newer one replaces it
        (a_start, a_end), (b_start, b_end) = results["a"]["window"], results["b"]["window"]
        assert a_end <= b_start, "both builds were publishing at the same time"
        assert b["published"] and (a["version"], b["version"]) == (2, 3)
    else:  # the newer export first: the older one is refused (rule older_inputs), not published over it
        assert b["published"] and b["version"] == 2 and results["a"]["window"] is None
        refused = json.loads(next((store / publish.REFUSED_NAME).glob("*/report.json")).read_text())
        assert any(reason.startswith("older_inputs: version 2") for reason in refused["gate"]["reasons"])
    for name, (members, _) in zip("ab", corpora):
        if results[name]["outcome"]["published"]:
            folder = store / str(results[name]["outcome"]["version"])
            keys = members_of(members)
            assert open_filter(folder / publish.ARTIFACT_NAME).contains_many(keys).all()
            assert json.loads((folder / publish.REPORT_NAME).read_text())["corpus"]["members"] == len(keys)
    assert publish.current_version(store) == b["version"]
    assert_no_leftovers(store)


# --- SIGKILL at every stage and every change to the store ---------------------------------------


@pytest.fixture(scope="module")
def kill_matrix(corpus, tmp_path_factory) -> dict:
    members, non_members = corpus
    # keep = 1: publishing version 2 removes version 1, so kills land inside the clean-up too
    plan = {"members": str(members), "non_members": str(non_members), "target": TARGET, "keep": 1}
    return run_fault_runner("kills", plan, tmp_path_factory.mktemp("kills"))


def _point_name(point: dict) -> str:
    kill = point["kill"]
    if "stage" in kill:
        return f"{kill['stage']} {kill['event']}"
    if "call" in kill:
        return f"before call {kill['call']}"
    return f"after {kill['after_seconds']} s"


@pytest.mark.slow
def test_the_kill_matrix_covers_every_stage_and_every_change_to_the_store(kill_matrix):
    points = kill_matrix["points"]
    killed = [p for p in points if p["status"] == "SIGKILL"]
    assert len(killed) >= 20
    # every kill at a stage event or a call landed; a timed kill may miss a fast build's end
    assert all(p["status"] == "SIGKILL" for p in points if "after_seconds" not in p["kill"]), [
        (_point_name(p), p["status"]) for p in points if p["status"] != "SIGKILL"
    ]
    calls = {call for call, _ in kill_matrix["trace"]["calls"]}
    assert {"mkdir", "write", "replace", "rename", "fsync", "rmtree"} <= calls
    assert any(path == "IN_SERVICE" or path.startswith(".IN_SERVICE.") for _, path in kill_matrix["trace"]["calls"])


@pytest.mark.slow
def test_after_every_kill_a_whole_version_serves_every_member(kill_matrix, corpus):
    members = members_of(corpus[0])
    for point in kill_matrix["points"]:
        killed = Path(point["killed"])
        current = assert_serves_every_member(killed, members)
        assert current in (1, 2), f"{_point_name(point)}: IN_SERVICE is {current}"


@pytest.mark.slow
def test_a_build_killed_before_it_writes_leaves_the_store_byte_for_byte(kill_matrix):
    base = snapshot(Path(kill_matrix["points"][0]["store"]).parent / "base")
    early = ("corpus", "features", "model", "regions", "filters")
    for point in kill_matrix["points"]:
        if point["kill"].get("stage") in early:
            assert snapshot(Path(point["killed"])) == base, _point_name(point)


@pytest.mark.slow
def test_after_every_kill_the_next_build_publishes_without_clean_up(kill_matrix, corpus):
    members = members_of(corpus[0])
    for point in kill_matrix["points"]:
        store, following = Path(point["store"]), point["next"]
        left_by_kill = publish.published_versions(Path(point["killed"]))
        if following.get("unchanged"):  # the kill came after its publish: the same inputs publish nothing
            assert following["version"] == left_by_kill[-1] == publish.current_version(Path(point["killed"])) == 2
        else:
            assert following.get("published") is True, f"{_point_name(point)}: {following}"
            assert following["version"] == left_by_kill[-1] + 1, _point_name(point)
        assert assert_serves_every_member(store, members) == following["version"]
        assert_no_leftovers(store)


# --- SIGKILL through the command line, after measured delays -------------------------------------

# Shares of the measured build (from its first progress line to the end of publishing) after which
# the CLI process is killed: early in the stages, and inside the report. Later shares miss: a
# build's run time varies by a third from one process to the next.
CLI_KILL_SHARES = (0.2, 0.55)


def _cli_env(tmp_path: Path) -> dict:
    env = {**os.environ}
    # the CLI's own quiet Prefect defaults, as a user gets them (conftest sets a louder level)
    env.pop("PREFECT_LOGGING_LEVEL", None)
    return env


def _start_cli_build(config: Path, members: Path, non_members: Path, store: Path, env: dict) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "tamis.cli", "build", str(config), "--members", str(members),
         "--non-members", str(non_members), "--target-fpr", str(TARGET), "--store", str(store)],
        stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, env=env,
    )


def _first_line_time(process: subprocess.Popen) -> float:
    """Wait for the build's first progress line (Prefect has started); its arrival time."""
    line = process.stderr.readline()
    assert line, "the build printed nothing"
    return time.monotonic()


def _published_line_time(process: subprocess.Popen) -> float:
    """Wait for the line that says publishing is done; its arrival time."""
    for line in process.stderr:
        if "publish" in line and "done" in line:
            return time.monotonic()
    raise AssertionError("the build never said it had published")


@pytest.mark.slow
def test_a_cli_build_killed_after_measured_delays_leaves_a_whole_version(corpus, tmp_path):
    members, non_members = corpus
    config = tmp_path / "small.toml"
    config.write_text(SMALL_CONFIG_TOML + "\n[store]\nkeep = 1\n")
    env = _cli_env(tmp_path)
    store = tmp_path / "store"
    # version 1 holds one member more, so that the killed builds have inputs of their own (a build
    # of the inputs of the version in service ends at once, publishing nothing)
    first = tmp_path / "first-members.txt"
    first.write_text(members.read_text(encoding="utf-8") + "version_one_only_member\n", encoding="utf-8")
    measured = _start_cli_build(config, first, non_members, store, env)
    started = _first_line_time(measured)
    duration = _published_line_time(measured) - started
    measured.stderr.read()
    assert measured.wait(timeout=300) == 0
    for share in CLI_KILL_SHARES:
        before = publish.current_version(store)
        process = _start_cli_build(config, members, non_members, store, env)
        _first_line_time(process)
        time.sleep(share * duration)
        process.send_signal(signal.SIGKILL)
        process.wait(timeout=60)
        process.stderr.close()
        assert process.returncode == -signal.SIGKILL, f"the build ended before the kill at {share:.0%}"
        assert publish.current_version(store) in (before, before + 1)
        assert_serves_every_member(store, members_of(members))
    with plain_build_flow() as build:
        following = build(small_config(members, non_members, store, target=TARGET, keep=1))
    assert following.published or following.unchanged  # unchanged: a killed build had published
    assert assert_serves_every_member(store, members_of(members)) == following.version
    assert_no_leftovers(store)
