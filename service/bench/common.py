"""What every bench section shares: targets, results, timers, recorded random draws.
"""

from __future__ import annotations

import statistics
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np


@dataclass(frozen=True)
class Target:
    """A performance target checked by the benchmark (never by a unit test).

    ``value`` is the wall-clock figure the target is judged on; ``cpu_value``,
    when given, is the same figure from thread CPU time, reported beside it
    because it is less disturbed by other processes on a busy machine.
    """

    name: str
    value: float
    limit: float
    kind: str  # "max": value <= limit passes; "min": value >= limit passes
    note: str = ""
    cpu_value: float | None = None

    def _ok(self, value: float) -> bool:
        return bool(value <= self.limit if self.kind == "max" else value >= self.limit)

    @property
    def passed(self) -> bool:
        return self._ok(self.value)

    def as_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"value": self.value, self.kind: self.limit, "pass": self.passed, "note": self.note}
        if self.cpu_value is not None:
            out["cpu_value"] = self.cpu_value
            out["cpu_pass"] = self._ok(self.cpu_value)
        return out


@dataclass
class SectionResult:
    figures: dict[str, Any]
    targets: list[Target] = field(default_factory=list)


# --------------------------------------------------------------------- timing
class Timer:
    """Wall-clock and thread CPU time of a block."""

    def __enter__(self) -> "Timer":
        self.wall0, self.cpu0 = time.perf_counter(), time.thread_time()
        return self

    def __exit__(self, *exc: object) -> None:
        self.wall = time.perf_counter() - self.wall0
        self.cpu = time.thread_time() - self.cpu0


def median(values: list[float]) -> float:
    return float(statistics.median(values))


# ---------------------------------------------------------------------- floor
class RecordingGenerator:
    """Delegates to a Generator and keeps a copy of every ``binomial`` call's arguments."""

    def __init__(self, rng: np.random.Generator) -> None:
        self._rng = rng
        self.binomial_calls: list[tuple[np.ndarray, np.ndarray]] = []

    def binomial(self, n: Any, p: Any, size: Any = None) -> Any:
        nn, pp = np.broadcast_arrays(np.asarray(n), np.asarray(p))
        self.binomial_calls.append((np.array(nn, dtype=np.int64), np.array(pp, dtype=float)))
        return self._rng.binomial(n, p, size)

    def __getattr__(self, name: str) -> Any:
        return getattr(self._rng, name)


def floor_draws(calls: list[tuple[np.ndarray, np.ndarray]], rng: np.random.Generator) -> None:
    """Draw the same binomial variates as the recorded day, with numpy alone."""
    for n, p in calls:
        rng.binomial(n, p)


