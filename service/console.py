"""What every command shares: reading a deployment config with a clear error,
and the progress display of long commands (on stderr only)."""

from __future__ import annotations

import shutil
import sys
import time
from collections.abc import Callable
from typing import TextIO

__all__ = ["PROGRESS_INTERVAL", "Progress", "format_duration", "load_config"]

# Seconds between plain progress lines when stderr is not a terminal (a log
# file, a pipe, a CI job). Read when a Progress is made, so tests can lower it.
PROGRESS_INTERVAL = 5.0


def load_config(path: str):
    """The deployment config at ``path``, or exit 2 with the loader's message."""
    from schemas import SpecError, load_deployment_config

    try:
        return load_deployment_config(path)
    except SpecError as exc:
        print(f"casecloud: {exc}", file=sys.stderr)
        raise SystemExit(2) from None


def format_duration(seconds: float) -> str:
    """``7 s``, ``3 min 05 s``, ``1 h 02 min``: whole seconds, rounded."""
    s = max(0, int(round(seconds)))
    if s < 60:
        return f"{s} s"
    if s < 3600:
        return f"{s // 60} min {s % 60:02d} s"
    return f"{s // 3600} h {s % 3600 // 60:02d} min"


class Progress:
    """How far one long task has got, with an estimate of the time left, on stderr.

    ``update(done)`` reports units done so far (an absolute count, not an
    increment); ``finish()`` ends the display. On a terminal the display is one
    line rewritten in place with a carriage return (at most every ``redraw``
    seconds, and always when ``done`` reaches ``total``), ended by a newline at
    ``finish``. Elsewhere (a log file, a pipe) a plain line is written when
    ``interval`` seconds have passed since the last one (or since the start),
    and ``finish`` writes a closing line if any line was written, so a short
    run stays silent.

    The estimate of the time left is the pace since the first ``update``
    (units done since then over time since then) applied to the units still
    to do. Measuring from the first update, not from zero, keeps the estimate
    right for a task resumed part-way (its first update already counts the
    earlier work) and leaves out start-up time before the first unit.

    ``clock``, ``tty``, ``interval`` and ``width`` are there for tests; by
    default the clock is ``time.monotonic``, ``tty`` is ``stream.isatty()``,
    ``interval`` is :data:`PROGRESS_INTERVAL` and the width is the terminal's.
    """

    def __init__(
        self,
        label: str,
        total: int,
        unit: str = "",
        *,
        stream: TextIO | None = None,
        clock: Callable[[], float] = time.monotonic,
        tty: bool | None = None,
        interval: float | None = None,
        redraw: float = 0.2,
        width: int | None = None,
        enabled: bool = True,
    ) -> None:
        self.label = label
        self.total = int(total)
        self.unit = unit
        self.stream = sys.stderr if stream is None else stream
        self.clock = clock
        if tty is None:
            isatty = getattr(self.stream, "isatty", None)
            tty = bool(isatty()) if callable(isatty) else False
        self.tty = tty
        self.interval = PROGRESS_INTERVAL if interval is None else float(interval)
        self.redraw = redraw
        self.width = width
        self.enabled = enabled
        self.started = clock()
        self.done = 0
        self.note = ""
        self._first: tuple[float, int] | None = None  # (time, done) at the first update
        self._last_written: float | None = None
        self._drawn = 0  # length of the line now on the terminal
        self.lines = 0  # lines (or redraws) written so far
        self.finished = False

    # ------------------------------------------------------------- estimate
    def remaining(self, now: float | None = None) -> float | None:
        """Seconds still to go at the pace since the first update; None until a pace is known."""
        if self._first is None:
            return None
        now = self.clock() if now is None else now
        t0, d0 = self._first
        if self.done <= d0 or now <= t0:
            return None
        return (now - t0) / (self.done - d0) * max(0, self.total - self.done)

    def _count(self) -> str:
        unit = f" {self.unit}" if self.unit else ""
        if self.total > 0:
            return f"{self.done}/{self.total}{unit} ({100 * self.done // self.total}%)"
        return f"{self.done}{unit}"

    def describe(self, now: float | None = None) -> str:
        """The progress text (without carriage return or newline)."""
        now = self.clock() if now is None else now
        elapsed = format_duration(now - self.started)
        if self.finished:
            ended = "done in" if self.done >= self.total else "stopped after"
            text = f"{self.label}: {self._count()}, {ended} {elapsed}"
        else:
            left = self.remaining(now)
            if left is None:
                eta = "time left not yet known"
            else:
                eta = f"about {format_duration(left)} left" if left >= 0.5 else "less than a second left"
            text = f"{self.label}: {self._count()}, {eta}, {elapsed} elapsed"
        return text + (f"; {self.note}" if self.note else "")

    # -------------------------------------------------------------- display
    def _bar(self) -> str:
        if self.total <= 0:
            return ""
        filled = min(20, 20 * self.done // self.total)
        return "[" + "#" * filled + "." * (20 - filled) + "] "

    def _draw(self, now: float, end: str = "") -> None:
        text = self.describe(now)
        if self.tty:
            width = self.width or shutil.get_terminal_size((80, 24)).columns
            bar = self._bar()
            if len(bar) + len(text) < width:  # the bar only where it fits: the estimate matters more
                text = bar + text
            text = text[: max(10, width - 1)]
            pad = " " * max(0, self._drawn - len(text))
            self.stream.write("\r" + text + pad + end)
            self._drawn = 0 if end else len(text)
        else:
            self.stream.write(text + "\n")
        self.stream.flush()
        self._last_written = now
        self.lines += 1

    def update(self, done: int, total: int | None = None, note: str | None = None) -> None:
        """``done`` units of ``total`` (unchanged if None) are finished; ``note`` says what is under way."""
        if total is not None:
            self.total = int(total)
        if note is not None:
            self.note = note
        self.done = int(done)
        now = self.clock()
        if self._first is None:
            self._first = (now, self.done)
        if not self.enabled or self.finished:
            return
        if self.tty:
            due = self._last_written is None or now - self._last_written >= self.redraw or self.done >= self.total > 0
        else:
            due = now - (self._last_written if self._last_written is not None else self.started) >= self.interval
        if due:
            self._draw(now)

    def finish(self, note: str = "") -> None:
        """End the display with a closing line ("done in", or "stopped after" short of the total),
        written only if a progress line was: a run too short to show progress stays silent.
        The note of the last update (what was under way) is replaced by ``note``."""
        if self.finished:
            return
        self.note = note
        self.finished = True
        if not self.enabled:
            return
        if self.lines:
            self._draw(self.clock(), end="\n" if self.tty else "")

    def __enter__(self) -> "Progress":
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.finish()
