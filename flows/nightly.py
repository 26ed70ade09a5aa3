"""The nightly build, served on the config's cron through a Prefect server.

    tamis schedule CONFIG
      -> serve_schedule(CONFIG)
           load and check the config (a bad one fails here, before anything starts)
           PREFECT_API_URL set?  use that server
                          unset? start `prefect server start` on a free loopback port as a child,
                                 under a guard that ends it when this process ends (tamis.flows.server_guard)
           register the deployment  tamis-nightly/<config stem>  (cron, timezone, config_path)
           run the runner that executes its flow runs, until Ctrl-C, SIGTERM or `stop_after_runs`
           on the way out: pause the deployment's schedule, stop the server child

Schedules need a real server: a Prefect process without PREFECT_API_URL gets a temporary API server
of its own whose scheduler never fires, hence the child server.

A build the gate refuses ends its flow run Failed, with the gate's reasons as the state message and
the summary dict as its data: the run shows red in the UI, and whatever alerting the operator hangs
on failed runs fires when the nightly artifact did not ship.
"""

from __future__ import annotations

import asyncio
import datetime
import os
import signal
import socket
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import pydantic
from prefect import flow, get_run_logger
from prefect.client.orchestration import get_client
from prefect.client.schemas.filters import (
    DeploymentFilter,
    DeploymentFilterId,
    FlowRunFilter,
    FlowRunFilterEndTime,
    FlowRunFilterState,
    FlowRunFilterStateType,
)
from prefect.client.schemas.objects import StateType
from prefect.client.schemas.schedules import CronSchedule
from prefect.runner import Runner
from prefect.schedules import Cron
from prefect.settings import PREFECT_API_URL, get_current_settings, temporary_settings
from prefect.states import Failed, State
from prefect.types.entrypoint import EntrypointType

from tamis.flows.build import BuildOutcome, flow_for
from tamis.flows.server_guard import guard
from tamis.config import BuildConfig, ConfigError, load_config, require_paths
from tamis.errors import BadInput
from tamis.progress import StageEvent

FLOW_NAME = "tamis-nightly"

# `prefect server start` is healthy after 5 to 15 s here; a first start on a fresh PREFECT_HOME also
# creates its database, which the ephemeral-server setting of 120 s (tamis.cli) allows for too.
SERVER_STARTUP_SECONDS = 120.0
# How often the startup wait asks /api/health: fine enough that the wait adds little to the start.
HEALTH_POLL_SECONDS = 0.5
# After SIGTERM the server gets this long to shut down before it is killed.
SERVER_STOP_SECONDS = 10.0
# How often `stop_after_runs` counts finished runs: a build takes tens of seconds, so a few seconds
# of delay in noticing the last one costs nothing.
RUN_COUNT_POLL_SECONDS = 2.0
# Final states of a flow run: each one ends a run for the `stop_after_runs` count.
FINAL_STATES = (StateType.COMPLETED, StateType.FAILED, StateType.CRASHED, StateType.CANCELLED)
# Flow runs at a time from this runner: two builds of one store at once only queue on its lock.
RUNNER_LIMIT = 1
# The signals that end serving in order: Ctrl-C in a terminal, SIGTERM from a service manager.
STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM)

# What a valid value looks like, for the keys whose own error message does not say.
SCHEDULE_HINTS = {"cron": ' (five fields: minute hour day-of-month month day-of-week, e.g. "15 2 * * *")'}


class ServerStartError(BadInput):
    """The Prefect server child did not become healthy; the message names its log file and a way out."""


@dataclass(frozen=True)
class PrefectApi:
    """Where the Prefect API is, and the server child behind it when this process started one."""

    url: str
    server_pid: int | None = None
    log: Path | None = None


@dataclass(frozen=True)
class Serving:
    """What `serve_schedule` tells `announce` once the deployment is registered and the runner polls."""

    api: PrefectApi
    deployment: str
    cron: str
    timezone: str
    config_path: Path


def outcome_summary(outcome: BuildOutcome) -> dict:
    """The small JSON-able result of one nightly run."""
    return {
        "published": outcome.published,
        "unchanged": outcome.unchanged,
        "version": outcome.version,
        "folder": str(outcome.folder),
        "reasons": list(outcome.report["gate"]["reasons"]),
    }


def final_state(summary: dict) -> dict | State:
    """A published build (or one whose inputs the version in service was already built from)
    completes with its summary; a refused one fails with the gate's reasons."""
    if summary["published"] or summary["unchanged"]:
        return summary
    return Failed(message="refused by the gate: " + "; ".join(summary["reasons"]), data=summary)


@flow(name=FLOW_NAME, log_prints=False)
def nightly_build(config_path: str) -> dict | State:
    """Read the config afresh (it may have changed since serving began) and run one build."""
    config = load_config(Path(config_path))
    logger = get_run_logger()

    def progress(event: StageEvent) -> None:
        if event.kind in ("done", "failed"):
            logger.info("stage %s %s after %.1f s", event.stage, event.kind, event.seconds)

    return final_state(outcome_summary(flow_for(config)(config, progress)))


def deployment_name(config_path: Path) -> str:
    """The deployment's name: the config file's stem, with "_" for "%" (which Prefect refuses in a
    name, as it refuses "/", which a stem cannot hold)."""
    return config_path.stem.replace("%", "_")


def check_schedule(config: BuildConfig, where: Path) -> None:
    """The cron and timezone as Prefect will read them; a ConfigError names the bad key."""
    try:
        CronSchedule(cron=config.schedule.cron, timezone=config.schedule.timezone)
    except pydantic.ValidationError as exc:
        error = exc.errors()[0]
        field = error["loc"][0] if error["loc"] else "cron"
        hint = SCHEDULE_HINTS.get(field, "")
        raise ConfigError(f"config key schedule.{field} in {where}: {error['msg'].removeprefix('Value error, ')}{hint}") from None


def load_schedule_config(config_path: Path) -> BuildConfig:
    """The config, checked as far as it can be before the first night: keys, paths given, schedule."""
    config = load_config(config_path)
    require_paths(config)
    check_schedule(config, config_path)
    return config


def free_loopback_port() -> int:
    """A TCP port nobody listens on right now (the kernel picks it for a socket bound to port 0)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def api_is_healthy(api_url: str) -> bool:
    """Whether a Prefect API answers its health check (200) right now."""
    try:
        with urllib.request.urlopen(f"{api_url}/health", timeout=2) as answer:
            return answer.status == 200
    except (urllib.error.URLError, OSError):
        return False


def _server_advice(log: Path) -> str:
    return f"see its log {log}, or set PREFECT_API_URL to a Prefect server that is running"


def wait_until_healthy(api_url: str, server: subprocess.Popen, log: Path, timeout: float = SERVER_STARTUP_SECONDS) -> None:
    deadline = time.monotonic() + timeout
    while not api_is_healthy(api_url):
        if server.poll() is not None:
            raise ServerStartError(f"the Prefect server exited with code {server.returncode} before it answered; {_server_advice(log)}")
        if time.monotonic() > deadline:
            raise ServerStartError(f"the Prefect server at {api_url} did not answer /health within {timeout:.0f} s; {_server_advice(log)}")
        time.sleep(HEALTH_POLL_SECONDS)


def stop_server(server: subprocess.Popen) -> None:
    """SIGTERM to the server's process group, then SIGKILL if it is still there after a grace period."""
    if server.poll() is not None:
        return
    try:
        os.killpg(server.pid, signal.SIGTERM)
        server.wait(timeout=SERVER_STOP_SECONDS)
    except subprocess.TimeoutExpired:
        os.killpg(server.pid, signal.SIGKILL)
        server.wait()
    except ProcessLookupError:
        server.wait()  # it ended between the check and the signal


@contextmanager
def signals_held() -> Iterator[None]:
    """Ctrl-C and SIGTERM wait while the block runs (a bounded cleanup that must not be cut short)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = {sig: signal.signal(sig, signal.SIG_IGN) for sig in STOP_SIGNALS}
    try:
        yield
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)


@contextmanager
def local_server(home: Path, timeout: float = SERVER_STARTUP_SECONDS) -> Iterator[PrefectApi]:
    """`prefect server start` on a free loopback port, in its own process group, logging into `home`."""
    port = free_loopback_port()
    home.mkdir(parents=True, exist_ok=True)
    log = home / f"tamis-server-{port}.log"
    env = {name: value for name, value in os.environ.items() if name != "PREFECT_API_URL"}
    command = [sys.executable, "-m", "prefect", "server", "start", "--host", "127.0.0.1", "--port", str(port)]
    with open(log, "wb") as log_file:
        # its own process group: a Ctrl-C in the terminal reaches only us, and we stop the server last
        server = subprocess.Popen(command, stdin=subprocess.DEVNULL, stdout=log_file, stderr=subprocess.STDOUT,
                                  env=env, process_group=0)
    guard(server.pid, group=True)  # the server group ends with this process, even one killed with SIGKILL
    try:
        api = PrefectApi(url=f"http://127.0.0.1:{port}/api", server_pid=server.pid, log=log)
        wait_until_healthy(api.url, server, log, timeout)
        yield api
    finally:
        with signals_held():
            stop_server(server)


@contextmanager
def prefect_api() -> Iterator[PrefectApi]:
    """The configured Prefect API, or a local server started for as long as the block runs."""
    configured = PREFECT_API_URL.value()
    if configured:
        yield PrefectApi(url=configured)
        return
    with local_server(get_current_settings().home) as api:
        previous = os.environ.get("PREFECT_API_URL")
        # the environment for the flow-run subprocesses, the settings context for this process
        os.environ["PREFECT_API_URL"] = api.url
        try:
            with temporary_settings(updates={PREFECT_API_URL: api.url}):
                yield api
        finally:
            if previous is None:
                os.environ.pop("PREFECT_API_URL", None)
            else:
                os.environ["PREFECT_API_URL"] = previous


@contextmanager
def sigterm_raises_interrupt() -> Iterator[None]:
    """Outside the event loop, SIGTERM raises KeyboardInterrupt as Ctrl-C does, so every cleanup on
    the way out (the server child above all) runs for either."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def interrupt(signum, frame):
        raise KeyboardInterrupt

    previous = signal.signal(signal.SIGTERM, interrupt)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


@contextmanager
def stop_signals_set(stop: asyncio.Event) -> Iterator[None]:
    """Inside the event loop, Ctrl-C and SIGTERM set `stop` instead, so the runner can stop in order.

    Once started, the runner puts its own SIGTERM handler in place, which stops it the same way. On
    the way out the handlers from before are put back (the loop alone would leave the default, under
    which a SIGTERM would end the process without its cleanup)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    loop = asyncio.get_running_loop()
    previous = {sig: signal.getsignal(sig) for sig in STOP_SIGNALS}
    for sig in STOP_SIGNALS:
        loop.add_signal_handler(sig, stop.set)
    try:
        yield
    finally:
        for sig, handler in previous.items():
            loop.remove_signal_handler(sig)
            signal.signal(sig, handler)


async def finished_runs(deployment_id, since: datetime.datetime) -> int:
    """Runs of the deployment that reached a final state after `since`."""
    async with get_client() as client:
        return await client.count_flow_runs(
            deployment_filter=DeploymentFilter(id=DeploymentFilterId(any_=[deployment_id])),
            flow_run_filter=FlowRunFilter(
                state=FlowRunFilterState(type=FlowRunFilterStateType(any_=list(FINAL_STATES))),
                end_time=FlowRunFilterEndTime(after_=since),
            ),
        )


async def stop_requested(stop: asyncio.Event, deployment_id, since: datetime.datetime, stop_after_runs: int | None,
                         runner: Runner) -> None:
    """Returns once `stop` is set, or once `stop_after_runs` runs have finished since `since` and the
    runner holds none any more.

    A run's final state reaches the API from the run's own process, before that process has exited
    and the runner has let it go; a runner stopped in between cancels the run it still holds,
    replacing its final state with Cancelled('Runner is shutting down.'). With RUNNER_LIMIT = 1 a
    free slot means the runner holds no run."""
    while not stop.is_set():
        if (
            stop_after_runs is not None
            and await finished_runs(deployment_id, since) >= stop_after_runs
            and runner.has_slots_available()
        ):
            return
        try:
            await asyncio.wait_for(stop.wait(), RUN_COUNT_POLL_SECONDS)
        except asyncio.TimeoutError:
            pass


async def runner_started(runner: Runner, runner_task: asyncio.Task) -> bool:
    """Waits until the runner polls for work (True) or has already ended (False)."""
    while not runner.started and not runner_task.done():
        await asyncio.sleep(0.05)
    return not runner_task.done()


async def run_until_stopped(runner: Runner, deployment_id, stop: asyncio.Event, stop_after_runs: int | None,
                            on_started: Callable[[], None]) -> None:
    """Run the runner until `stop`, SIGTERM (the runner's own handler) or the run count; then stop it.

    The runner pauses the deployment's schedule on its way out (pause_on_shutdown)."""
    since = datetime.datetime.now(datetime.timezone.utc)
    runner_task = asyncio.create_task(runner.start())
    stopping = asyncio.create_task(stop_requested(stop, deployment_id, since, stop_after_runs, runner))
    try:
        if await runner_started(runner, runner_task):
            on_started()
        await asyncio.wait({runner_task, stopping}, return_when=asyncio.FIRST_COMPLETED)
        if stopping.done() and await runner_started(runner, runner_task):
            await runner.astop()
        await runner_task
        if stopping.done():
            stopping.result()  # an error while counting runs surfaces once the runner has stopped
    finally:
        stopping.cancel()


async def serve_deployment(config: BuildConfig, config_path: Path, api: PrefectApi, stop_after_runs: int | None,
                           announce: Callable[[Serving], None]) -> None:
    """Register the deployment (cron, timezone, config path) and run a runner for it until stopped."""
    name = deployment_name(config_path)
    serving = Serving(api=api, deployment=f"{FLOW_NAME}/{name}", cron=config.schedule.cron,
                      timezone=config.schedule.timezone, config_path=config_path)
    stop = asyncio.Event()
    with stop_signals_set(stop):
        runner = Runner(name=f"tamis-schedule-{name}", limit=RUNNER_LIMIT, pause_on_shutdown=True)
        deployment_id = await runner.aadd_flow(
            nightly_build,
            name=name,
            schedule=Cron(config.schedule.cron, timezone=config.schedule.timezone),
            parameters={"config_path": str(config_path)},
            paused=False,
            description=f"nightly tamis build of {config_path}",
            tags=["tamis"],
            entrypoint_type=EntrypointType.MODULE_PATH,
        )
        await run_until_stopped(runner, deployment_id, stop, stop_after_runs, lambda: announce(serving))


def serve_schedule(config_path: Path, *, stop_after_runs: int | None = None,
                   announce: Callable[[Serving], None] | None = None) -> None:
    """Serve the nightly build on the config's cron until Ctrl-C, SIGTERM or `stop_after_runs` runs end.

    A bad config raises ConfigError before any server starts. With PREFECT_API_URL unset a local
    server is started and stopped again; `announce` hears where everything is once serving begins.
    """
    if stop_after_runs is not None and stop_after_runs < 1:
        raise ValueError(f"stop_after_runs must be at least 1 or None, got {stop_after_runs}")
    config_path = Path(config_path).resolve()
    config = load_schedule_config(config_path)
    announce = announce or (lambda serving: None)
    try:
        with sigterm_raises_interrupt(), prefect_api() as api:
            asyncio.run(serve_deployment(config, config_path, api, stop_after_runs, announce))
    except KeyboardInterrupt:
        pass  # Ctrl-C or SIGTERM is how serving is meant to end; everything is stopped by now


def serving_line(serving: Serving) -> str:
    """The one line `tamis schedule` prints once it serves: what, when, where, how to stop."""
    api = serving.api
    where = f"Prefect API {api.url}"
    if api.server_pid is not None:
        where += f" (local server, log {api.log})"
    return (
        f"tamis: serving {serving.deployment} for {serving.config_path} on cron '{serving.cron}' "
        f"({serving.timezone}); {where}; stop with Ctrl-C or SIGTERM"
    )


def main_schedule(config_path: Path) -> int:
    """`tamis schedule CONFIG`: serve until stopped, then 0. A bad config or a server that cannot
    start raises BadInput (ConfigError, ServerStartError), which the CLI turns into exit code 2."""
    serve_schedule(config_path, announce=lambda serving: print(serving_line(serving), flush=True))
    return 0
