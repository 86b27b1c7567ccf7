"""The shared progress display of long commands (``service.console.Progress``), on a fake clock.

The estimate of the time left is checked against the arithmetic it promises
(pace since the first update times the units left), not against a real clock.
"""

from __future__ import annotations

import io

import pytest

from service.console import Progress, format_duration


class Clock:
    """A clock the test moves by hand."""

    def __init__(self, now: float = 1000.0) -> None:
        self.now = now

    def __call__(self) -> float:
        return self.now


def make(tty: bool, total: int = 10, **kw):
    clock, out = Clock(), io.StringIO()
    return Progress("task", total, "rows", stream=out, clock=clock, tty=tty, **kw), clock, out


@pytest.mark.parametrize(
    ("seconds", "text"),
    [(0.4, "0 s"), (7.4, "7 s"), (59.6, "1 min 00 s"), (185, "3 min 05 s"), (3720, "1 h 02 min")],
)
def test_durations_read_as_minutes_and_hours(seconds, text):
    # Bug caught: 185 s shown as "3 min 5 s" or "185 s"; rounding 59.6 s to "60 s".
    assert format_duration(seconds) == text


def test_time_left_is_the_pace_since_the_first_update_times_what_is_left():
    shown, clock, _ = make(tty=False, total=100, interval=1e9)
    clock.now += 30  # start-up before the first unit: not part of the pace
    shown.update(20)  # first update: a resumed task may already be at 20
    assert shown.remaining() is None  # no pace yet
    clock.now += 10
    shown.update(30)  # 10 units in 10 s
    assert shown.remaining() == pytest.approx(70.0)  # 70 units left at 1 unit/s
    # Bug caught: pace measured from zero units at construction (30 units in 40 s would say 93 s).
    assert "about 1 min 10 s left, 40 s elapsed" in shown.describe()


def test_not_a_terminal_writes_a_plain_line_every_interval_and_a_closing_line():
    shown, clock, out = make(tty=False, total=10, interval=5.0)
    for done in range(1, 11):
        clock.now += 2
        shown.update(done)
    shown.finish()
    lines = out.getvalue().splitlines()
    # Updates at 2, 4, ..., 20 s: a line once 5 s have passed since the last (6, 12, 18 s), then the
    # closing one. The pace since the first update (1 row at 2 s) is 2 s a row throughout.
    assert lines == [
        "task: 3/10 rows (30%), about 14 s left, 6 s elapsed",
        "task: 6/10 rows (60%), about 8 s left, 12 s elapsed",
        "task: 9/10 rows (90%), about 2 s left, 18 s elapsed",
        "task: 10/10 rows (100%), done in 20 s",
    ]
    # Bug caught: carriage returns in a log file, or a line per update flooding it.
    assert "\r" not in out.getvalue()


def test_not_a_terminal_a_short_run_writes_nothing():
    shown, clock, out = make(tty=False, interval=5.0)
    for done in range(1, 11):
        clock.now += 0.1
        shown.update(done)
    shown.finish()
    # Bug caught: a closing line (or a line per update) on every fast command's stderr.
    assert out.getvalue() == ""


def test_terminal_rewrites_one_line_and_ends_it_at_finish():
    shown, clock, out = make(tty=True, total=4, width=200)
    shown.update(1)
    clock.now += 0.05
    shown.update(2)  # within the redraw period: not drawn
    clock.now += 0.5
    shown.update(3, note="scoring")
    clock.now += 0.5
    shown.finish()
    text = out.getvalue()
    frames = text.split("\r")[1:]
    assert text.startswith("\r") and text.count("\n") == 1 and text.endswith("\n")
    assert [f.split("] ")[1].split(",")[0] for f in frames] == ["task: 1/4 rows (25%)", "task: 3/4 rows (75%)", "task: 3/4 rows (75%)"]
    # 2 units in 0.55 s since the first update: 1 unit left takes 0.275 s
    assert frames[1] == "[###############.....] task: 3/4 rows (75%), less than a second left, 1 s elapsed; scoring"
    # The last frame ends short of the total: said so, and the note of the last update is gone.
    assert frames[2].rstrip().endswith("task: 3/4 rows (75%), stopped after 1 s")
    # Bug caught: a newline per update (scrolling), or a final line left without a newline so the
    # command's next output lands on the progress line.


def test_terminal_line_is_padded_over_a_longer_previous_one_and_cut_to_the_width():
    shown, clock, out = make(tty=True, total=1000, width=60)
    shown.update(1, note="a long note that does not fit in sixty columns at all")
    clock.now += 1
    shown.update(2, note="")
    frames = out.getvalue().split("\r")[1:]
    assert all(len(f) <= 59 for f in frames)
    assert len(frames[1]) == len(frames[0])  # the shorter line is padded so no tail of the old one remains
    # The bar gives way before the estimate does.
    assert "about 16 min 38 s left" in frames[1] and not frames[1].startswith("[")


def test_a_disabled_display_writes_nothing_but_still_counts():
    shown, clock, out = make(tty=True, enabled=False)
    shown.update(5)
    clock.now += 10
    shown.update(6)
    shown.finish()
    # Bug caught: --quiet ignored.
    assert out.getvalue() == "" and shown.done == 6


def test_default_interval_is_read_when_the_display_is_made(monkeypatch):
    monkeypatch.setattr("service.console.PROGRESS_INTERVAL", 0.0)
    shown, clock, out = make(tty=False)
    shown.update(1)
    # Bug caught: the module default bound at import time, so commands could not be tested at interval 0.
    assert out.getvalue() == "task: 1/10 rows (10%), time left not yet known, 0 s elapsed\n"
