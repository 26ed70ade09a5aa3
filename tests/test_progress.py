"""Progress display: plain lines with the elapsed time off a terminal, a live rich display on one."""

import io

import pytest

from tamis.progress import LineProgress, LiveProgress, StageEvent, count_text, progress_display


class Clock:
    def __init__(self):
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def test_plain_lines_give_each_stage_its_end_and_a_long_one_its_advance():
    stream, clock = io.StringIO(), Clock()
    progress = LineProgress(stream, interval=10.0, clock=clock)
    progress(StageEvent("corpus", "start"))
    clock.now += 1.25
    progress(StageEvent("corpus", "done", seconds=1.25))
    progress(StageEvent("model", "start"))
    clock.now += 4
    progress(StageEvent("model", "step", done=3, unit="checkpoints priced"))  # 4 s after the last line: quiet
    clock.now += 7
    progress(StageEvent("model", "step", done=9, unit="checkpoints priced"))  # 11 s: a line
    clock.now += 1
    progress(StageEvent("model", "done", seconds=12.0))
    progress(StageEvent("verify", "start"))
    progress(StageEvent("verify", "failed", seconds=0.5))  # the build's own error message says it
    assert stream.getvalue().splitlines() == [
        "[    1.2 s] corpus    done in 1.2 s",
        "[   12.2 s] model     9 checkpoints priced",
        "[   13.2 s] model     done in 12.0 s",
    ]


def test_counts_read_as_a_share_when_the_total_is_known():
    assert count_text(StageEvent("features", "step", done=77_000, total=126_000, unit="keys")) == "61% (77,000 of 126,000 keys)"
    assert count_text(StageEvent("model", "step", done=12, unit="checkpoints priced")) == "12 checkpoints priced"


def test_an_unknown_event_kind_is_refused():
    with pytest.raises(ValueError, match="kind must be one of"):
        StageEvent("corpus", "begin")


class Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_a_terminal_gets_the_live_display_and_anything_else_plain_lines():
    with progress_display(io.StringIO()) as plain:
        assert isinstance(plain, LineProgress)
    with progress_display(Terminal()) as live:
        assert isinstance(live, LiveProgress)


def test_the_live_display_draws_every_stage_and_leaves_it_on_screen():
    screen = Terminal()
    with LiveProgress(screen) as live:
        live(StageEvent("features", "start"))
        live(StageEvent("features", "step", done=500, total=1000, unit="keys"))
        live(StageEvent("features", "step", done=1000, total=1000, unit="keys"))
        live(StageEvent("features", "done", seconds=0.5))
        live(StageEvent("model", "start"))
        live(StageEvent("model", "step", done=4, unit="checkpoints priced"))
        live(StageEvent("model", "failed", seconds=2.0))
    drawn = screen.getvalue()
    assert "start-up" in drawn and "features" in drawn and "100% (1,000 of 1,000 keys)" in drawn
    assert "model" in drawn and "4 checkpoints priced" in drawn and "FAILED" in drawn


def test_a_stage_that_ended_otherwise_than_done_says_how():
    """A refused build's publish stage publishes nothing: its line must not say "done"."""
    stream, clock = io.StringIO(), Clock()
    progress = LineProgress(stream, interval=10.0, clock=clock)
    progress(StageEvent("publish", "start"))
    clock.now += 0.5
    progress(StageEvent("publish", "done", seconds=0.5, note="refused: nothing published"))
    assert stream.getvalue().splitlines() == ["[    0.5 s] publish   refused: nothing published in 0.5 s"]
