"""A Dask cluster of real processes on loopback: `dask scheduler` and `dask worker` started as an
owner starts them (each worker without a nanny, so each is the very process started here), and
stopped by their own pids. For tests/test_cluster_processes.py and benchmarks/cluster_scale.py.
"""

from __future__ import annotations

import json
import os
import resource
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

START_SECONDS = 60  # a scheduler and its workers answer within a few seconds on this machine
STOP_SECONDS = 15


@dataclass
class DaskProcesses:
    address: str
    processes: dict[str, subprocess.Popen]
    # each process's peak resident set in bytes, known once it stopped (os.wait4)
    peak_rss: dict[str, int] = field(default_factory=dict)


def _dask(*args: str, log: Path) -> subprocess.Popen:
    command = [str(Path(sys.executable).with_name("dask")), *args]
    return subprocess.Popen(command, stdout=log.open("wb"), stderr=subprocess.STDOUT, env=os.environ.copy())


def _stop(process: subprocess.Popen) -> int:
    """Stop one process started here, by its own pid; its peak resident set in bytes (0 when it
    had ended and been reaped before)."""
    if process.returncode is not None:
        return 0
    process.send_signal(signal.SIGTERM)
    deadline = time.monotonic() + STOP_SECONDS
    while True:
        pid, status, usage = os.wait4(process.pid, os.WNOHANG)
        if pid:
            break
        if time.monotonic() > deadline:
            process.kill()
            pid, status, usage = os.wait4(process.pid, 0)
            break
        time.sleep(0.1)
    process.returncode = os.waitstatus_to_exitcode(status)
    return usage.ru_maxrss * 1024  # kilobytes on Linux


@contextmanager
def dask_cluster(folder: Path, workers: int = 2, memory_limit: str = "3GiB", threads: int = 1) -> Iterator[DaskProcesses]:
    """A scheduler and `workers` worker processes on 127.0.0.1 (no dashboards; logs in `folder`)."""
    folder.mkdir(parents=True, exist_ok=True)
    address_file = folder / "scheduler.json"
    started = DaskProcesses("", {})
    started.processes["scheduler"] = _dask("scheduler", "--host", "127.0.0.1", "--port", "0", "--no-dashboard",
                                           "--scheduler-file", str(address_file), log=folder / "scheduler.log")
    try:
        deadline = time.monotonic() + START_SECONDS
        while not address_file.exists():
            if started.processes["scheduler"].poll() is not None or time.monotonic() > deadline:
                raise RuntimeError(f"the scheduler did not start: {(folder / 'scheduler.log').read_text()}")
            time.sleep(0.2)
        for i in range(workers):
            started.processes[f"worker{i}"] = _dask(
                "worker", "--scheduler-file", str(address_file), "--host", "127.0.0.1", "--no-nanny", "--nthreads",
                str(threads), "--no-dashboard", "--memory-limit", memory_limit, "--name", f"worker{i}",
                log=folder / f"worker{i}.log")
        started.address = json.loads(address_file.read_text())["address"]
        from distributed import Client

        with Client(started.address, timeout=START_SECONDS) as client:
            client.wait_for_workers(workers, timeout=START_SECONDS)
        yield started
    finally:
        for name, process in reversed(started.processes.items()):
            started.peak_rss[name] = _stop(process)


def own_peak_rss() -> int:
    """This process's peak resident set in bytes."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
