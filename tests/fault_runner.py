"""Builds killed at many points, and builds racing on one store, for tests/test_faults.py.

    python tests/fault_runner.py kills PLAN_JSON RESULTS_JSON
    python tests/fault_runner.py race PLAN_JSON RESULTS_JSON

The runner imports the build stack once, then runs every build in a process forked from itself, so
a build costs its own run time, not the 10 s of imports. Builds run the flow's body without Prefect
(tests/tamis_testing.py). Builds run one at a time: two at once on the two cores took twice as long
in all, not half (their thread pools contend).

`kills` (PLAN: members, non_members, target, keep, work):
1. a build publishes version 1 into WORK/base, from the members and one more (so the builds below
   have inputs of their own: a build of the same inputs as the version in service publishes nothing);
2. a copy of it, WORK/trace, gets a build that records every watched file-system call, and
   another copy, WORK/timed, a build that is timed;
3. for each kill point, a copy WORK/point-I of the base store gets a build killed with SIGKILL
   there; the store as the kill left it is copied to WORK/point-I-killed, and then a build runs on
   WORK/point-I with no clean-up in between. Kill points: the start of every stage and the end of
   publishing (progress events); just before each watched call that changes what the store holds
   (a kill before an fsync leaves the same files as one just after the call before it); and after
   measured delays spread over the traced build's duration (the killer is the parent process).

The report page's charts are not drawn here (draw_figures is replaced by one that draws none):
drawing them takes 80% of a small build, and what a kill tests is the files the build writes,
which are the same (report.html is still written, through the same call, at the same point).

Watched calls are those on paths inside the store: os.mkdir, os.rename, os.replace, os.unlink,
shutil.rmtree, os.fsync, and each write() to a file opened for writing there. SIGKILL gives a build
no chance to clean up: what it leaves is what the OOM killer would leave.

`race` (PLAN: corpora [[members, non_members], [members, non_members]], store, target, work): a
build publishes version 1 (from the first corpus and one more member), then two builds start at once on the store, each of its own corpus;
each waits, once its staging folder exists, until the other's exists too, so both are in flight
together, and logs when its publish call starts and ends.

RESULTS_JSON receives what each build did; the tests judge it.
"""

from __future__ import annotations

import builtins
import io
import json
import os
import shutil
import signal
import sys
import time
import traceback
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import tamis.flows.build  # noqa: E402  (the build stack, imported once before any fork)
from tamis import publish, report_page  # noqa: E402
from tamis_testing import plain_build_flow, small_config  # noqa: E402

# Calls that change what the store holds; a kill point goes just before each of them.
CHANGING_CALLS = {"mkdir", "rename", "replace", "unlink", "rmtree", "write"}
# Kill delays, as shares of the timed build's duration (0.8 at most: a build runs a little
# faster or slower from one process to the next, and the last one must still land inside).
DELAY_SHARES = (0.1, 0.3, 0.5, 0.65, 0.8)
# How long a racing build waits for the other's staging folder before giving up.
RACE_TIMEOUT_SECONDS = 120


class Watch:
    """Counts file-system calls on paths inside `store`; SIGKILLs this process at call `kill_at`."""

    def __init__(self, store: Path, kill_at: int | None):
        self.store = store.resolve()
        self.kill_at = kill_at
        self.calls: list[list[str]] = []

    def inside(self, path) -> str | None:
        try:
            resolved = Path(os.fsdecode(path)).resolve()
        except (TypeError, ValueError):
            return None
        return str(resolved.relative_to(self.store)) if resolved.is_relative_to(self.store) else None

    def __call__(self, call: str, path) -> None:
        where = self.inside(path)
        if where is None:
            return
        if self.kill_at == len(self.calls):
            os.kill(os.getpid(), signal.SIGKILL)
        self.calls.append([call, where])

    def install(self) -> None:
        """Route the calls through this watch, in this (forked, short-lived) process for good."""
        watch = self

        def watched(call: str, real):
            def wrapper(path, *args, **kwargs):
                if "dir_fd" not in kwargs:  # rmtree's own unlinks are part of the watched rmtree
                    watch(call, path)
                return real(path, *args, **kwargs)

            return wrapper

        real_fsync, real_open = os.fsync, builtins.open

        def fsync(fd):
            watch("fsync", os.readlink(f"/proc/self/fd/{fd}"))
            return real_fsync(fd)

        class WatchedFile:
            """A file opened for writing in the store: every write() is a watched call."""

            def __init__(self, handle, path):
                self._handle, self._path = handle, path

            def write(self, data):
                watch("write", self._path)
                return self._handle.write(data)

            def __enter__(self):
                self._handle.__enter__()
                return self

            def __exit__(self, *exc):
                return self._handle.__exit__(*exc)

            def __getattr__(self, name):
                return getattr(self._handle, name)

        def open_watched(file, mode="r", *args, **kwargs):
            handle = real_open(file, mode, *args, **kwargs)
            writing = any(c in mode for c in "wxa+")
            if writing and isinstance(file, (str, bytes, os.PathLike)) and watch.inside(file):
                return WatchedFile(handle, file)
            return handle

        os.mkdir = watched("mkdir", os.mkdir)
        os.rename = watched("rename", os.rename)
        os.replace = watched("replace", os.replace)
        os.unlink = watched("unlink", os.unlink)
        shutil.rmtree = watched("rmtree", shutil.rmtree)
        os.fsync = fsync
        builtins.open = io.open = open_watched


def build(plan: dict, store: Path, members: str | None = None, non_members: str | None = None,
          kill: dict | None = None, trace: Path | None = None, events: Path | None = None) -> dict:
    """One build into `store`; killed as `kill` says, its watched calls written to `trace`, and
    each progress event appended to `events` as "monotonic-time stage kind"."""
    kill = kill or {}
    watch = Watch(store, kill.get("call"))
    if "call" in kill or trace:
        watch.install()
    log = open(events, "a", buffering=1) if events else None  # line-buffered: a kill loses nothing

    def progress(event) -> None:
        if log and event.kind != "step":
            log.write(f"{time.monotonic()} {event.stage} {event.kind}\n")
        if kill.get("stage") == event.stage and kill.get("event") == event.kind:
            os.kill(os.getpid(), signal.SIGKILL)

    config = small_config(
        Path(members or plan["members"]), Path(non_members or plan["non_members"]), store,
        target=plan["target"], keep=plan.get("keep", 10),
    )
    with plain_build_flow() as run:
        outcome = run(config, progress=progress)
    if trace:
        trace.write_text(json.dumps({"calls": watch.calls}))
    return {"published": outcome.published, "version": outcome.version, "unchanged": outcome.unchanged}


def fork(work, kill_after: float | None = None) -> int:
    """Run `work()` in a forked child (SIGKILLed after `kill_after` seconds if given); its wait status."""
    pid = os.fork()
    if pid == 0:
        code = 1
        try:
            work()
            code = 0
        except BaseException:
            traceback.print_exc()
        finally:
            os._exit(code)
    if kill_after is not None:
        time.sleep(kill_after)
        try:
            os.kill(pid, signal.SIGKILL)
        except ProcessLookupError:
            pass  # it finished first; its status says so
    return os.waitpid(pid, 0)[1]


def status_text(status: int) -> str:
    if os.WIFSIGNALED(status):
        return signal.Signals(os.WTERMSIG(status)).name
    return f"exit {os.WEXITSTATUS(status)}"


def write_json(path: Path, value) -> None:
    path.write_text(json.dumps(value))


def read_json(path: Path):
    """The JSON value in `path`, or None when the file was never written."""
    return json.loads(path.read_text()) if path.exists() else None


def kill_points(calls: list[list[str]], seconds: float) -> list[dict]:
    points = [{"stage": stage, "event": "start"} for stage in tamis.flows.build.STAGES]
    points.append({"stage": "publish", "event": "done"})
    points += [{"call": i} for i, (call, _) in enumerate(calls) if call in CHANGING_CALLS and not _middle_write(calls, i)]
    points += [{"after_seconds": round(share * seconds, 3)} for share in DELAY_SHARES]
    return points


def _middle_write(calls: list[list[str]], index: int) -> bool:
    """A write to a file that is neither its first nor its last (the ones between change nothing new)."""
    call, path = calls[index]
    if call != "write":
        return False
    same = [i for i, (c, p) in enumerate(calls) if c == "write" and p == path]
    return index not in (same[0], same[-1])


def run_point(plan: dict, work: Path, index: int, kill: dict) -> dict:
    """Kill a build at `kill` on a copy of the base store, keep what it left, then build again."""
    store = work / f"point-{index}"
    shutil.copytree(work / "base", store, symlinks=True)
    delay = kill.get("after_seconds")
    events = work / f"point-{index}.events"
    status = fork(lambda: build(plan, store, kill=None if delay is not None else kill, events=events), kill_after=delay)
    killed = work / f"point-{index}-killed"
    shutil.copytree(store, killed, symlinks=True)
    last_event = events.read_text().splitlines()[-1].split()[1:] if events.exists() and events.read_text() else None
    result = {"kill": kill, "status": status_text(status), "killed": str(killed), "store": str(store), "last_event": last_event}
    done = work / f"point-{index}-next.json"
    next_status = fork(lambda: write_json(done, build(plan, store)))
    result["next"] = read_json(done) if next_status == 0 else {"error": status_text(next_status)}
    return result


def with_one_more(members: str, into: Path) -> str:
    """A members file of every member of `members` and one more: a version 1 that holds every
    member and that the builds of `members` change."""
    into.write_text(Path(members).read_text(encoding="utf-8") + "version_one_only_member\n", encoding="utf-8")
    return str(into)


def kills(plan: dict) -> dict:
    work = Path(plan["work"])
    base, trace_store, trace_file = work / "base", work / "trace", work / "trace.json"
    first = with_one_more(plan["members"], work / "base-members.txt")
    if fork(lambda: build(plan, base, first)) != 0:
        raise SystemExit("the base build failed")
    shutil.copytree(base, trace_store, symlinks=True)
    if fork(lambda: build(plan, trace_store, trace=trace_file)) != 0:
        raise SystemExit("the traced build failed")
    traced = json.loads(trace_file.read_text())
    timed, timed_events = work / "timed", work / "timed.events"
    shutil.copytree(base, timed, symlinks=True)
    started = time.monotonic()
    if fork(lambda: build(plan, timed, events=timed_events)) != 0:
        raise SystemExit("the timed build failed")
    # from the fork to the end of publishing, unwatched (the watch slows every write)
    traced["seconds"] = float(timed_events.read_text().splitlines()[-1].split()[0]) - started
    points = kill_points(traced["calls"], traced["seconds"])
    return {"trace": traced, "points": [run_point(plan, work, i, kill) for i, kill in enumerate(points)]}


def racing_build(plan: dict, work: Path, name: str, members: str, non_members: str) -> None:
    """A build that meets the other racer once both have staging folders, and logs its publish."""
    real_new_staging, real_publish = publish.new_staging, publish.publish_staging

    def new_staging(store, build_id):
        staging = real_new_staging(store, build_id)
        (work / f"staged-{name}").write_text(str(staging))
        deadline = time.monotonic() + RACE_TIMEOUT_SECONDS
        while len(list(work.glob("staged-*"))) < 2:
            if time.monotonic() > deadline:
                raise TimeoutError("the other build never made its staging folder")
            time.sleep(0.01)
        return staging

    def publish_staging(store, staging, keep):
        started = time.monotonic()
        version = real_publish(store, staging, keep)
        write_json(work / f"window-{name}.json", [started, time.monotonic()])
        return version

    publish.new_staging, publish.publish_staging = new_staging, publish_staging
    outcome = build(plan, Path(plan["store"]), members, non_members)
    write_json(work / f"outcome-{name}.json", outcome)


def race(plan: dict) -> dict:
    work, store = Path(plan["work"]), Path(plan["store"])
    (first_members, first_non), _ = plan["corpora"]
    first_members = with_one_more(first_members, work / "first-members.txt")
    if fork(lambda: build(plan, store, first_members, first_non)) != 0:
        raise SystemExit("the first build failed")
    pids = {}
    for name, (members, non_members) in zip("ab", plan["corpora"]):
        pid = os.fork()
        if pid == 0:
            code = 1
            try:
                racing_build(plan, work, name, members, non_members)
                code = 0
            except BaseException:
                traceback.print_exc()
            finally:
                os._exit(code)
        pids[name] = pid
    statuses = {name: status_text(os.waitpid(pid, 0)[1]) for name, pid in pids.items()}
    return {
        name: {
            "status": statuses[name],
            "outcome": read_json(work / f"outcome-{name}.json"),
            "window": read_json(work / f"window-{name}.json"),
        }
        for name in pids
    }


def undrawn_figures(report: dict, scores) -> dict:
    return {}


def main(mode: str, plan_path: str, results_path: str) -> int:
    plan = json.loads(Path(plan_path).read_text())
    report_page.draw_figures = undrawn_figures
    results = {"kills": kills, "race": race}[mode](plan)
    write_json(Path(results_path), results)
    return 0


if __name__ == "__main__":
    sys.exit(main(*sys.argv[1:]))
