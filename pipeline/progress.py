"""Progress of a build, stage by stage: events from the flow, shown as plain lines or a live display.

The flow sends a `StageEvent` when a stage starts, as a long stage advances, and when it ends; the
stage functions themselves know nothing of it. `LineProgress` writes plain lines (logs, CI, tests);
`LiveProgress` draws one bar per stage with rich when stderr is a terminal.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import TextIO

EVENT_KINDS = ("start", "step", "done", "failed")


@dataclass(frozen=True)
class StageEvent:
    """One thing that happened to a stage.

    kind: "start", "step" (it advanced), "done" or "failed". For "step", `done` units of `total`
    are finished (`total` None when the stage cannot know it in advance) and `note` may say more;
    for "done" and "failed", `seconds` is the stage's elapsed time, and a "done" `note` says how it
    ended when "done" alone would mislead (a refused build publishes nothing).
    """

    stage: str
    kind: str
    done: int = 0
    total: int | None = None
    unit: str = ""
    note: str = ""
    seconds: float = 0.0

    def __post_init__(self) -> None:
        if self.kind not in EVENT_KINDS:
            raise ValueError(f"a stage event's kind must be one of {EVENT_KINDS}, got {self.kind!r}")


Progress = Callable[[StageEvent], None]


def no_progress(event: StageEvent) -> None:
    """The progress that shows nothing."""


def count_text(event: StageEvent) -> str:
    """"61% (77,000 of 126,000 keys)", or "12 checkpoints" when the total is unknown."""
    unit = f" {event.unit}" if event.unit else ""
    if event.total:
        return f"{event.done / event.total:.0%} ({event.done:,} of {event.total:,}{unit})"
    return f"{event.done:,}{unit}"


class LineProgress:
    """Plain lines on a stream, each with the time since the build started.

    A line when a stage ends, and while a long one advances a line at most every `interval`
    seconds (ten seconds keeps a CI log readable through a minute of training). Nothing for a
    stage's start or failure: a failed build's own message names the stage, and a build refused
    for bad input before any stage ended keeps stderr to that one line.
    """

    def __init__(self, stream: TextIO | None = None, interval: float = 10.0, clock: Callable[[], float] = time.perf_counter):
        self._stream = stream if stream is not None else sys.stderr
        self._interval = interval
        self._clock = clock
        self._started = clock()
        self._last_line = self._started

    def _write(self, stage: str, text: str) -> None:
        now = self._clock()
        self._last_line = now
        print(f"[{now - self._started:7.1f} s] {stage:<9} {text}", file=self._stream, flush=True)

    def __call__(self, event: StageEvent) -> None:
        if event.kind == "step" and self._clock() - self._last_line >= self._interval:
            self._write(event.stage, " ".join(filter(None, (count_text(event), event.note))))
        elif event.kind == "done":
            self._write(event.stage, f"{event.note or 'done'} in {event.seconds:.1f} s")


class LiveProgress:
    """A live display on a terminal: one line per stage with a bar, its count and its elapsed time.

    Until the first stage starts, a "start-up" line counts the wait for the flow to begin (an
    embedded Prefect API starts first). Use as a context manager; the finished display stays on
    the screen.
    """

    def __init__(self, stream: TextIO | None = None):
        from rich.console import Console
        from rich.progress import BarColumn, Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

        self._display = Progress(
            SpinnerColumn(finished_text="[green]done[/]"),
            TextColumn("{task.description:<9}"),
            BarColumn(),
            TextColumn("{task.fields[count]}"),
            TimeElapsedColumn(),
            TextColumn("{task.fields[note]}"),
            console=Console(file=stream if stream is not None else sys.stderr),
        )
        self._tasks: dict[str, int] = {}
        self._totals: dict[str, int] = {}

    def __enter__(self) -> LiveProgress:
        self._display.start()
        self._add("start-up")
        return self

    def __exit__(self, *exc_info) -> None:
        self._display.stop()

    def _add(self, stage: str) -> None:
        self._tasks[stage] = self._display.add_task(stage, total=None, count="", note="")

    def _finish(self, stage: str) -> None:
        # a stage without a known total (a spinner so far) ends as one full step
        finished = self._totals.get(stage, 1)
        self._display.update(self._tasks[stage], completed=finished, total=finished)

    def __call__(self, event: StageEvent) -> None:
        if event.kind == "start":
            if "start-up" in self._tasks and len(self._tasks) == 1:
                self._finish("start-up")
            self._add(event.stage)
            return
        task = self._tasks[event.stage]
        if event.kind == "step":
            if event.total:
                self._totals[event.stage] = event.total
            self._display.update(task, completed=event.done, total=event.total, count=count_text(event), note=event.note)
        elif event.kind == "done":
            self._finish(event.stage)
            if event.note:
                self._display.update(task, note=event.note)
        else:
            self._display.update(task, note="[red]FAILED[/]")
            self._display.stop_task(task)


@contextmanager
def progress_display(stream: TextIO | None = None) -> Iterator[Progress]:
    """The live display when `stream` (default stderr) is a terminal, plain lines otherwise."""
    stream = stream if stream is not None else sys.stderr
    if stream.isatty():
        with LiveProgress(stream) as live:
            yield live
    else:
        yield LineProgress(stream)
