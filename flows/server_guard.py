"""A guard that ends a server child once the process that started it has ended, however it ended.

A build that is killed with SIGKILL (an out-of-memory killer, a CI timeout) runs no clean-up, so a
Prefect API server it started would run on forever. `guard(pid)` starts a small process that holds
the read end of a pipe whose only write end this process keeps. The kernel closes that end when
this process ends, in any way, so the guard's read returns end-of-file at once (the usual way to
learn that a parent died, common practice): the guard then sends the server SIGTERM, and SIGKILL
if it is still there after a grace period.

The guard names its target by a pidfd (Linux 5.3 and later) opened while the target is certainly
alive, so a number reused by another process after the target ended is never signalled; where
pidfds do not exist it falls back to the process number. It runs in a session of its own, so a
Ctrl-C in the terminal does not end it before it has done its work.

    python -m tamis.flows.server_guard PID [group]     (stdin: the pipe; "group": signal PID's process group)
"""

from __future__ import annotations

import os
import select
import signal
import sys

# After SIGTERM the server gets this long to shut down before SIGKILL.
GRACE_SECONDS = 5.0

# The write ends of the guards' pipes: held, never written, until this process ends.
_held_write_ends: list[int] = []


def guard(pid: int, *, group: bool = False) -> int:
    """Start a guard that ends process `pid` (its whole process group when `group`) once this
    process has ended; returns the guard's process id."""
    read_end, write_end = os.pipe()  # both close on exec: no other child of this process holds them
    command = [sys.executable, "-m", "tamis.flows.server_guard", str(pid), *(["group"] if group else [])]
    try:
        # posix_spawn rather than subprocess: the guard outlives this process by design, and a
        # Popen object would warn at exit that its child is still running
        guard_pid = os.posix_spawn(
            sys.executable, command, os.environ,
            file_actions=[
                (os.POSIX_SPAWN_DUP2, read_end, 0),
                (os.POSIX_SPAWN_OPEN, 1, os.devnull, os.O_WRONLY, 0),
                (os.POSIX_SPAWN_DUP2, 1, 2),
            ],
            setsid=True,
        )
    finally:
        os.close(read_end)
    _held_write_ends.append(write_end)
    return guard_pid


def start_temporary_server() -> None:
    """When no PREFECT_API_URL is set, start Prefect's temporary API server now, under a guard.

    It is the server Prefect would start on first use (one per process: Prefect keeps it as a
    singleton), so the flow then uses this one. Prefect stops it at a normal exit; the guard ends
    it after any other. Prefect 3 spawns the server process in the instance's
    `_run_uvicorn_command` and then waits 5 to 25 s for it to answer; wrapping that method on the
    instance puts the guard in place the moment the process exists, not after the wait (a build
    killed during it would otherwise leave the server behind). Should a later Prefect no longer
    have the method, the guard is put in place once the server answers.
    """
    from prefect.settings import PREFECT_API_URL, PREFECT_SERVER_EPHEMERAL_ENABLED

    if PREFECT_API_URL.value() or not PREFECT_SERVER_EPHEMERAL_ENABLED.value():
        return
    from prefect.server.api.server import SubprocessASGIServer

    server = SubprocessASGIServer()
    spawn = getattr(server, "_run_uvicorn_command", None)
    if spawn is None:
        server.start()
        guard(server.server_process.pid)
        return

    def spawn_guarded():
        process = spawn()
        guard(process.pid)
        return process

    server._run_uvicorn_command = spawn_guarded
    server.start()


class _Target:
    """The guarded process, by pidfd when the system has them."""

    def __init__(self, pid: int, group: bool):
        self.pid, self.group = pid, group
        try:
            self.fd: int | None = os.pidfd_open(pid)
        except (AttributeError, OSError):
            self.fd = None

    def ended_within(self, seconds: float) -> bool:
        if self.fd is not None:
            return bool(select.select([self.fd], [], [], seconds)[0])  # a pidfd reads ready once its process ended
        try:
            os.kill(self.pid, 0)
        except ProcessLookupError:
            return True
        return False

    def send(self, signum: int) -> None:
        if self.ended_within(0):
            return
        try:
            if self.group:
                os.killpg(self.pid, signum)
            elif self.fd is not None:
                signal.pidfd_send_signal(self.fd, signum)
            else:
                os.kill(self.pid, signum)
        except ProcessLookupError:
            pass


def main(argv: list[str]) -> int:
    target = _Target(int(argv[0]), group=argv[1:] == ["group"])
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    while sys.stdin.buffer.read(65536):  # nothing is ever written: this returns at end-of-file
        pass
    target.send(signal.SIGTERM)
    if not target.ended_within(GRACE_SECONDS):
        target.send(signal.SIGKILL)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
