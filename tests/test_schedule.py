"""`tamis schedule`: the nightly flow served on the config's cron through a real Prefect server.

The fast tests check what happens before anything starts (a bad config), the state a refused build
leaves, and the server-start errors. The slow ones start real `prefect server start` processes on
loopback, serve the deployment in a separate process, trigger runs through the API and stop every
process by its id.
"""

import asyncio
import dataclasses
import datetime
import json
import os
import queue
import re
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
from prefect.client.orchestration import get_client
from prefect.deployments import run_deployment
from prefect.exceptions import ObjectNotFound
from prefect.settings import PREFECT_API_URL, temporary_settings
from prefect.states import State

import tamis.flows.nightly as nightly
from tamis.flows.build import BuildOutcome
from tamis import publish
from tamis.cli import PREFECT_DEFAULTS
from tamis.config import ConfigError
from tamis.demo import write_demo_corpus

# Lookup counts are heavy-tailed, so the 12,000 held-out handles of this corpus weigh like about
# 260 unweighted draws: a 5% target can be bounded at that size, 1% cannot. Seed 3 gave a held-out
# upper bound near 2.7% when the test was written, well inside the gate.
MEMBERS, NON_MEMBERS, SEED, TARGET = 3000, 40000, 3, 0.05
# One model candidate instead of six: the slow test is about scheduling, and this cuts a build of
# the corpus above from about 25 s to about 9 s (same gate verdict for seed 3).
ONE_CANDIDATE = "[model]\nleaves = [7]\nlearning_rates = [0.3]\n"
# The runner asks the server for due runs every 10 s by default; every 2 s, a triggered run starts
# sooner and the slow test waits less.
RUNNER_POLL_SECONDS = "2"
# A cron and zone other than the defaults, so that reading them back shows they came from the file.
CRON, TIMEZONE = "40 3 * * 2", "Europe/Berlin"
# Waits of the slow tests: a server is healthy after 5 to 15 s on this kind of machine, a build of
# this corpus takes 5 to 60 s depending on how busy the two cores are.
SERVER_WAIT, RUN_WAIT, EXIT_WAIT = 90, 150, 40


def write_config(folder: Path, name: str, corpus: tuple[Path, Path] | None = None, extra: str = "") -> Path:
    members, lookups = corpus or (folder / "members.txt", folder / "lookups.parquet")
    path = folder / f"{name}.toml"
    path.write_text(
        f'[corpus]\nmembers = "{members}"\nnon_members = "{lookups}"\n'
        f"[target]\nfpr = {TARGET}\n"
        f'[store]\npath = "{folder / "store"}"\n'
        f'[schedule]\ncron = "{CRON}"\ntimezone = "{TIMEZONE}"\n' + extra,
        encoding="utf-8",
    )
    return path


# ---------------------------------------------------------------- fast: before anything starts


@pytest.fixture
def nothing_may_start(monkeypatch):
    """Any attempt to reach or start a Prefect server, or to start a runner, fails the test loudly."""

    def forbidden(*args, **kwargs):
        raise AssertionError("something started although the config is bad")

    monkeypatch.setattr(nightly, "prefect_api", forbidden)
    monkeypatch.setattr(nightly, "local_server", forbidden)
    monkeypatch.setattr(nightly, "Runner", forbidden)
    monkeypatch.delenv("PREFECT_API_URL", raising=False)


@pytest.mark.parametrize(
    ("edit", "named"),
    [
        (lambda text: text.replace(CRON, "61 3 * * *"), "schedule.cron"),
        (lambda text: text.replace(CRON, "40 3 * *"), "schedule.cron"),
        (lambda text: text.replace(TIMEZONE, "Mars/Olympus_Mons"), "schedule.timezone"),
        (lambda text: text + "when = 3\n", "schedule.when"),
        (lambda text: text.replace("[store]\n", "[store]\nkeep = 0\n"), "store.keep"),
        (lambda text: text.replace("fpr = 0.05", "fpr = 2.0"), "target.fpr"),
        (lambda text: "\n".join(line for line in text.splitlines() if not line.startswith("path")), "store.path"),
    ],
)
def test_a_bad_config_fails_before_any_server_starts(tmp_path, nothing_may_start, edit, named):
    path = write_config(tmp_path, "nightly")
    path.write_text(edit(path.read_text()))
    with pytest.raises(ConfigError, match=named.replace(".", r"\.")):
        nightly.serve_schedule(path)


def test_a_missing_config_file_fails_before_any_server_starts(tmp_path, nothing_may_start):
    with pytest.raises(ConfigError, match="cannot read config"):
        nightly.serve_schedule(tmp_path / "absent.toml")


def test_stop_after_runs_must_be_positive(tmp_path, nothing_may_start):
    with pytest.raises(ValueError, match="stop_after_runs"):
        nightly.serve_schedule(write_config(tmp_path, "nightly"), stop_after_runs=0)


def test_ctrl_c_and_sigterm_ask_the_serving_loop_to_stop_and_the_old_handlers_return():
    before = {sig: signal.getsignal(sig) for sig in nightly.STOP_SIGNALS}

    async def send_each_signal() -> None:
        for sig in nightly.STOP_SIGNALS:
            stop = asyncio.Event()
            with nightly.stop_signals_set(stop):
                os.kill(os.getpid(), sig)
                await asyncio.wait_for(stop.wait(), timeout=10)

    asyncio.run(send_each_signal())
    assert {sig: signal.getsignal(sig) for sig in nightly.STOP_SIGNALS} == before


def _outcome(published: bool, reasons: list[str]) -> BuildOutcome:
    return BuildOutcome(published=published, version=4 if published else None, folder=Path("/srv/store/4"),
                        report={"gate": {"passed": published, "reasons": reasons}})


def test_serving_stops_only_once_the_runner_has_let_its_last_run_go(monkeypatch):
    # A run's final state reaches the API from its own process before that process exits; a runner
    # stopped in between cancels the run it still holds and overwrites the state with
    # Cancelled('Runner is shutting down.'). Here the count is reached at once, and the runner
    # holds the run for two more polls.
    async def two_finished(deployment_id, since):
        return 2

    class HoldingRunner:
        polls_holding = 2

        def has_slots_available(self) -> bool:
            self.polls_holding -= 1
            return self.polls_holding < 0

    monkeypatch.setattr(nightly, "finished_runs", two_finished)
    monkeypatch.setattr(nightly, "RUN_COUNT_POLL_SECONDS", 0.01)
    runner = HoldingRunner()

    async def serve() -> None:
        await nightly.stop_requested(asyncio.Event(), "deployment", datetime.datetime.now(datetime.timezone.utc), 2, runner)

    asyncio.run(serve())
    assert runner.polls_holding == -1


def test_a_published_build_completes_with_its_summary():
    summary = nightly.outcome_summary(_outcome(True, []))
    assert summary == {"published": True, "unchanged": False, "version": 4, "folder": "/srv/store/4", "reasons": []}
    assert nightly.final_state(summary) is summary


def test_a_build_of_the_inputs_in_service_completes_too():
    outcome = dataclasses.replace(_outcome(False, []), unchanged=True)
    summary = nightly.outcome_summary(outcome)
    assert summary["unchanged"] and nightly.final_state(summary) is summary


def test_a_refused_build_fails_with_the_gate_reasons_as_its_message():
    reasons = ["fpr_upper: too high", "max_artifact_bytes: too big"]
    summary = nightly.outcome_summary(_outcome(False, reasons))
    state = nightly.final_state(summary)
    assert isinstance(state, State) and state.is_failed()
    assert state.message == "refused by the gate: fpr_upper: too high; max_artifact_bytes: too big"
    assert state.data == summary


def test_the_deployment_is_named_after_the_config_file():
    assert nightly.deployment_name(Path("/etc/tamis/nightly.toml")) == "nightly"
    assert nightly.deployment_name(Path("/etc/tamis/100%.toml")) == "100_"
    assert nightly.deployment_name(Path("/etc/tamis/nightly.eu.toml")) == "nightly.eu"


def test_a_server_that_exits_early_is_reported_with_its_log(tmp_path):
    log = tmp_path / "server.log"
    dying = subprocess.Popen([sys.executable, "-c", "raise SystemExit(3)"])
    try:
        with pytest.raises(nightly.ServerStartError, match=f"exited with code 3 .*{re.escape(str(log))}"):
            nightly.wait_until_healthy(f"http://127.0.0.1:{nightly.free_loopback_port()}/api", dying, log, timeout=30)
    finally:
        dying.kill()
        dying.wait()


def test_a_server_that_never_answers_times_out_with_its_log(tmp_path):
    log = tmp_path / "server.log"
    silent = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        with pytest.raises(nightly.ServerStartError, match=f"did not answer /health within 1 s.*{re.escape(str(log))}"):
            nightly.wait_until_healthy(f"http://127.0.0.1:{nightly.free_loopback_port()}/api", silent, log, timeout=1)
    finally:
        silent.kill()
        silent.wait()


# ---------------------------------------------------------------- slow: real servers


def prefect_env(home: Path, api_url: str | None = None) -> dict[str, str]:
    env = {name: value for name, value in os.environ.items() if name != "PREFECT_API_URL"}
    env.update(PREFECT_DEFAULTS)
    env["PREFECT_HOME"] = str(home)
    if api_url:
        env["PREFECT_API_URL"] = api_url
    return env


def wait_for(what: str, check, timeout: float, every: float = 0.5):
    deadline = time.monotonic() + timeout
    while True:
        value = check()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"{what}: not within {timeout} s")
        time.sleep(every)


def process_gone(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    return Path(f"/proc/{pid}/stat").read_text().split(") ")[1].startswith("Z")  # a zombie has ended too


def stop_and_reap(process: subprocess.Popen, sig: int = signal.SIGTERM) -> None:
    if process.poll() is None:
        process.send_signal(sig)
        try:
            process.wait(timeout=EXIT_WAIT)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait()


SERVE = "import sys; from pathlib import Path; from tamis.flows.nightly import serve_schedule; serve_schedule(Path(sys.argv[1]), stop_after_runs=int(sys.argv[2]))"


def read_deployment(name: str):
    with get_client(sync_client=True) as client:
        try:
            return client.read_deployment_by_name(name)
        except ObjectNotFound:  # until the serving process has registered it
            return None


@pytest.fixture(scope="module")
def prefect_home(tmp_path_factory) -> Path:
    """One PREFECT_HOME for the slow tests: a server's first start there creates its database, which
    takes 15 to 20 s more on a busy machine, and only the first test need pay for it."""
    return tmp_path_factory.mktemp("prefect-home")


@pytest.mark.slow
def test_a_served_deployment_builds_and_publishes_on_request(tmp_path, prefect_home):
    home = prefect_home
    port = nightly.free_loopback_port()
    api_url = f"http://127.0.0.1:{port}/api"
    with open(tmp_path / "server.log", "wb") as log:
        server = subprocess.Popen(
            [sys.executable, "-m", "prefect", "server", "start", "--host", "127.0.0.1", "--port", str(port)],
            stdout=log, stderr=subprocess.STDOUT, env=prefect_env(home), process_group=0,
        )
    serving = None
    try:
        corpus = write_demo_corpus(tmp_path / "corpus", members=MEMBERS, non_members=NON_MEMBERS, seed=SEED)
        config = write_config(tmp_path, "nightly", corpus, ONE_CANDIDATE)
        # the same corpus and store with a size limit no artifact meets: the gate must refuse it
        refused = write_config(tmp_path, "too-small", corpus, ONE_CANDIDATE + "[gate]\nmax_artifact_bytes = 100\n")
        wait_for("server healthy", lambda: nightly.api_is_healthy(api_url) or server.poll() is not None, SERVER_WAIT)
        assert server.poll() is None, (tmp_path / "server.log").read_text()[-2000:]
        env = {**prefect_env(home, api_url), "PREFECT_RUNNER_POLL_FREQUENCY": RUNNER_POLL_SECONDS}
        with open(tmp_path / "serve.log", "wb") as log:
            serving = subprocess.Popen([sys.executable, "-c", SERVE, str(config), "2"], env=env,
                                       stdout=log, stderr=subprocess.STDOUT)

        def registered():
            assert serving.poll() is None, (tmp_path / "serve.log").read_text()[-3000:]
            return read_deployment(name)

        with temporary_settings(updates={PREFECT_API_URL: api_url}):
            name = f"{nightly.FLOW_NAME}/nightly"
            deployment = wait_for("deployment registered", registered, 60)
            # the config's cron, timezone and path reached the deployment
            assert [(s.schedule.cron, s.schedule.timezone, s.active) for s in deployment.schedules] == [(CRON, TIMEZONE, True)]
            assert deployment.parameters == {"config_path": str(config)}
            assert not deployment.paused

            run = run_deployment(name, timeout=RUN_WAIT)
            assert run.state.is_completed(), f"{run.state}\n{(tmp_path / 'serve.log').read_text()[-3000:]}"
            store = tmp_path / "store"
            assert publish.current_version(store) == 1
            report = json.loads((store / "1" / publish.REPORT_NAME).read_text())
            assert report["gate"]["passed"] and report["gate"]["reasons"] == []
            assert report["version"] == 1 and report["corpus"]["members"] == MEMBERS

            run = run_deployment(name, parameters={"config_path": str(refused)}, timeout=RUN_WAIT)
            assert run.state.is_failed(), str(run.state)
            assert run.state.message.startswith("refused by the gate: max_artifact_bytes")
            assert publish.current_version(store) == 1 and publish.published_versions(store) == [1]

            # two runs have ended: the serving process stops by itself and pauses the schedule
            assert serving.wait(timeout=EXIT_WAIT) == 0, (tmp_path / "serve.log").read_text()[-3000:]
            assert read_deployment(name).paused
    finally:
        if serving is not None:
            stop_and_reap(serving)
        stop_and_reap(server)
    assert process_gone(serving.pid) and process_gone(server.pid)
    with pytest.raises(ProcessLookupError):
        os.killpg(server.pid, 0)  # nothing of the server's process group is left


def child_pids(pid: int) -> list[int]:
    children = []
    for task in Path(f"/proc/{pid}/task").iterdir():
        children += [int(c) for c in (task / "children").read_text().split()]
    return children


def first_line_starting(stream, prefix: str, timeout: float) -> str:
    lines: queue.Queue = queue.Queue()
    threading.Thread(target=lambda: [lines.put(line) for line in stream], daemon=True).start()
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            line = lines.get(timeout=max(0.0, deadline - time.monotonic()))
        except queue.Empty:
            break
        if line.startswith(prefix):
            return line
    raise AssertionError(f"no line starting {prefix!r} within {timeout} s")


@pytest.mark.slow
def test_schedule_starts_its_own_server_and_stops_it_on_sigterm(tmp_path, prefect_home):
    home = prefect_home
    config = write_config(tmp_path, "nightly")  # serving needs no corpus until the first night
    main = "import sys; from pathlib import Path; from tamis.flows.nightly import main_schedule; sys.exit(main_schedule(Path(sys.argv[1])))"
    with open(tmp_path / "serve.err", "wb") as err:
        serving = subprocess.Popen([sys.executable, "-c", main, str(config)], env=prefect_env(home), text=True,
                                   stdout=subprocess.PIPE, stderr=err)
    servers: list[int] = []
    try:
        line = first_line_starting(serving.stdout, "tamis: serving", SERVER_WAIT + 30)
        assert f"on cron '{CRON}' ({TIMEZONE})" in line and "stop with Ctrl-C" in line
        api_url = line.split("Prefect API ")[1].split()[0]
        assert api_url.startswith("http://127.0.0.1:") and nightly.api_is_healthy(api_url)
        assert f"log {home}" in line
        servers = [pid for pid in child_pids(serving.pid) if "prefect\0server\0start" in Path(f"/proc/{pid}/cmdline").read_text()]
        assert len(servers) == 1

        serving.send_signal(signal.SIGTERM)
        assert serving.wait(timeout=EXIT_WAIT) == 0, (tmp_path / "serve.err").read_text()[-3000:]
        assert not nightly.api_is_healthy(api_url)
    finally:
        stop_and_reap(serving, signal.SIGKILL)
        serving.stdout.close()
        for pid in servers:
            if not process_gone(pid):
                os.killpg(pid, signal.SIGKILL)
    assert process_gone(serving.pid)
    assert servers and all(process_gone(pid) for pid in servers)
