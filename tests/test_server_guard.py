"""A server child ends with the process that started it, even when that process is killed with
SIGKILL: first a sleeping child under a guard, then the temporary Prefect API server of a real
`tamis build`."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tamis_testing import SMALL_CONFIG_TOML, write_small_corpus

# The guard acts at once when its parent ends; the target then gets SIGTERM and, after the grace
# period (tamis.flows.server_guard.GRACE_SECONDS = 5 s), SIGKILL. A server that is still there after
# this long has leaked.
GONE_WITHIN_SECONDS = 15.0


def is_running(pid: int) -> bool:
    """True while `pid` exists and is not a zombie (an ended process its new parent has not reaped)."""
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii") as handle:
            return handle.read().rsplit(")", 1)[1].split()[0] != "Z"
    except FileNotFoundError:
        return False


def descendants(pid: int) -> list[int]:
    """Every process below `pid`, from the parent numbers in /proc."""
    children: dict[int, list[int]] = {}
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                parent = int((entry / "stat").read_text().rsplit(")", 1)[1].split()[1])
            except (OSError, IndexError, ValueError):
                continue
            children.setdefault(parent, []).append(int(entry.name))
    found, todo = [], [pid]
    while todo:
        for child in children.get(todo.pop(), []):
            found.append(child)
            todo.append(child)
    return found


def command_line(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode(errors="replace")
    except OSError:
        return ""


def wait_until_gone(pids: list[int]) -> list[int]:
    """The pids still running after GONE_WITHIN_SECONDS (none, when all ended in time)."""
    deadline = time.monotonic() + GONE_WITHIN_SECONDS
    while time.monotonic() < deadline:
        left = [pid for pid in pids if is_running(pid)]
        if not left:
            return []
        time.sleep(0.1)
    return [pid for pid in pids if is_running(pid)]


_PARENT = """
import subprocess, sys, time
from tamis.flows.server_guard import guard
child = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(600)"], process_group=0)
guard(child.pid, group=sys.argv[1] == "group")
print(child.pid, flush=True)
time.sleep(600)
"""


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
@pytest.mark.parametrize("mode", ["one", "group"])
def test_a_guarded_child_ends_when_its_parent_is_killed(mode):
    parent = subprocess.Popen([sys.executable, "-c", _PARENT, mode], stdout=subprocess.PIPE, text=True)
    child = int(parent.stdout.readline())
    try:
        assert is_running(child)
        parent.kill()  # SIGKILL: the parent runs no clean-up at all
        parent.wait()
        assert wait_until_gone([child]) == []
    finally:
        if is_running(child):
            os.kill(child, signal.SIGKILL)


def test_a_guarded_child_lives_while_its_parent_does():
    parent = subprocess.Popen([sys.executable, "-c", _PARENT, "one"], stdout=subprocess.PIPE, text=True)
    child = int(parent.stdout.readline())
    try:
        time.sleep(1.0)
        assert is_running(child)
    finally:
        parent.kill()
        parent.wait()
    assert wait_until_gone([child]) == []


def is_prefect_server(pid: int) -> bool:
    return "prefect.server.api.server:create_app" in command_line(pid)


@pytest.mark.slow
@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_a_build_killed_with_sigkill_leaves_no_prefect_server_running(tmp_path):
    members, non_members = write_small_corpus(tmp_path / "corpus")
    config = tmp_path / "build.toml"
    config.write_text(SMALL_CONFIG_TOML)
    # the CLI's own Prefect settings (no PREFECT_API_URL: it starts its temporary server)
    env = {k: v for k, v in os.environ.items() if k != "PREFECT_API_URL"}
    build = subprocess.Popen(
        [sys.executable, "-m", "tamis.cli", "build", str(config), "--members", str(members), "--non-members",
         str(non_members), "--target-fpr", "0.05", "--store", str(tmp_path / "store")],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env,
    )
    servers: list[int] = []
    try:
        deadline = time.monotonic() + 180
        while not servers and build.poll() is None and time.monotonic() < deadline:
            servers = [pid for pid in descendants(build.pid) if is_prefect_server(pid)]
            time.sleep(0.2)
        assert servers, "the build started no Prefect server (or ended before one was seen)"
        build.kill()
        build.wait()
        assert wait_until_gone(servers) == [], f"Prefect servers left running: {servers}"
    finally:
        if build.poll() is None:
            build.kill()
            build.wait()
        for pid in servers:
            if is_running(pid):
                os.kill(pid, signal.SIGKILL)
