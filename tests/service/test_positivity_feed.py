"""A lab feed of positives out of tests, through the real service loop.

The stream runs ``tests/filters/specs/sir_positivity.toml`` (daily ``cases`` and
a beta-binomial ``lab_positive`` series); messages carry the number of tests
in ``tests`` next to ``counts``. Each bad record must become one dead letter
with its reason and exact bytes, leave the cloud and the checkpoint files as
they were, and the next good record must be applied.

======================================  ===========================================  =============
bad input                               example                                      reason
======================================  ===========================================  =============
positives without tests                 ``counts: {lab_positive: 4}``                ``bad_tests``
zero tests                              ``tests: {lab_positive: 0}``                 ``bad_tests``
positives above tests                   31 positives, 30 tests                       ``bad_tests``
negative tests                          ``tests: {lab_positive: -5}``                ``bad_tests``
fractional tests                        ``tests: {lab_positive: 40.5}``              ``bad_tests``
tests for a count series                ``tests: {cases: 40}``                       ``bad_tests``
a past positivity value (a snapshot)    day 3 after day 5                            ``late``
======================================  ===========================================  =============
"""

from __future__ import annotations

import asyncio
import base64
import datetime as dt
from pathlib import Path
from typing import Any

import numpy as np
import orjson
import pytest
from prometheus_client import CollectorRegistry

from schemas import DeadLetter, DeploymentConfig, EstimateMessage
from service.runtime.app import Service
from service.runtime.metrics import Metrics
from service.transports import MemoryTransport

SPEC = Path(__file__).parents[1] / "filters" / "specs" / "sir_positivity.toml"
STREAM = "pellbrook.lab"
START = dt.date(2026, 1, 1)
TODAY = dt.date(2026, 3, 1)


def msg(d: int, counts: dict[str, Any], tests: Any = None) -> bytes:
    body: dict[str, Any] = {"stream": STREAM, "period": (START + dt.timedelta(days=d)).isoformat(), "counts": counts}
    if tests is not None:
        body["tests"] = tests
    return orjson.dumps(body)


def good(d: int) -> bytes:
    return msg(d, {"cases": 5 + d, "lab_positive": 6 + d}, {"lab_positive": 300})


class Run:
    def __init__(self, root: Path, records: list[bytes]) -> None:
        config = DeploymentConfig.model_validate(
            {
                "service": {"seed": 3, "checkpoint_dir": str(root / "checkpoints"), "keep_checkpoints": 100},
                "metrics": {"enabled": False},
                "streams": [{"id": STREAM, "model": str(SPEC), "start": START.isoformat(), "particles": 200,
                             "forecast_trajectories": 20, "forecast_horizon_days": 7}],
            }
        )
        self.root = root
        self.transport = MemoryTransport(records)
        self.registry = CollectorRegistry()
        self.trace: list[dict[str, Any]] = []
        self.service = Service(config, self.transport, metrics=Metrics(registry=self.registry), today=lambda: TODAY,
                               on_outcome=self._record, pipeline=False)
        self.counts = asyncio.run(self.service.run(until_exhausted=True))

    def _record(self, outcome) -> None:
        runtime = self.service.registry.runtimes.get(STREAM)
        cloud = None
        if runtime is not None:
            header, arrays = runtime.filter.state()
            cloud = (orjson.dumps(header, option=orjson.OPT_SORT_KEYS), {k: v.tobytes() for k, v in arrays.items()})
        files = {str(p): p.read_bytes() for p in sorted((self.root / "checkpoints").rglob("*")) if p.is_file()}
        self.trace.append({"outcome": outcome, "cloud": cloud, "files": files})

    def letters(self) -> list[DeadLetter]:
        return [DeadLetter.model_validate(orjson.loads(r.value)) for r in self.transport.published["dead_letters"]]


def test_positives_with_their_tests_are_assimilated(tmp_path):
    run = Run(tmp_path, [good(d) for d in range(1, 6)])
    assert run.counts == {"applied": 5, "skipped": 0, "dead_letter": 0}
    est = [EstimateMessage.model_validate(orjson.loads(r.value)) for r in run.transport.published["estimates"]]
    assert [e.day for e in est] == [1, 2, 3, 4, 5]
    assert all(e.log_evidence_increment is not None and np.isfinite(e.log_evidence_increment) for e in est)
    # the forecast carries the share positive (no future test counts are known): a probability
    block = est[-1].forecast
    assert block is not None
    shares = np.array(block["series"]["lab_positive"]["mean"], dtype=float)
    assert np.all((shares >= 0) & (shares <= 1))


def test_the_tests_change_the_weights(tmp_path):
    # The same positives out of 300 or out of 3000 tests say different things about
    # prevalence. Bug caught: the tests dropped on the way from the message to the
    # Report (a default number of tests, or the positivity series skipped).
    few = Run(tmp_path / "a", [msg(1, {"lab_positive": 30}, {"lab_positive": 300})])
    many = Run(tmp_path / "b", [msg(1, {"lab_positive": 30}, {"lab_positive": 3000})])
    e_few = orjson.loads(few.transport.published["estimates"][0].value)["log_evidence_increment"]
    e_many = orjson.loads(many.transport.published["estimates"][0].value)["log_evidence_increment"]
    assert e_few != e_many


@pytest.mark.parametrize(
    ("bad", "reason", "mentions"),
    [
        (msg(3, {"lab_positive": 4}), "bad_tests", ["tests.lab_positive", "given None", "at least 1"]),
        (msg(3, {"lab_positive": 4}, {"lab_positive": None}), "bad_tests", ["tests.lab_positive", "given None"]),
        (msg(3, {"lab_positive": 0}, {"lab_positive": 0}), "bad_tests", ["tests.lab_positive", "given 0", "at least 1"]),
        (msg(3, {"lab_positive": 31}, {"lab_positive": 30}), "bad_tests", ["31 positives", "30 tests", "cannot exceed"]),
        (msg(3, {"lab_positive": 3}, {"lab_positive": -5}), "bad_tests", ["tests.lab_positive", "-5", "greater than or equal to 0"]),
        (msg(3, {"lab_positive": 3}, {"lab_positive": 40.5}), "bad_tests", ["tests.lab_positive", "40.5", "valid integer"]),
        (msg(3, {"cases": 3}, {"cases": 40}), "bad_tests", ["tests.cases", "not a positivity series"]),
        (msg(3, {"cases": 3}, {"deaths": 40}), "bad_tests", ["tests.deaths", "not a positivity series"]),
    ],
    ids=["missing", "null", "zero", "above-tests", "negative", "fractional", "count-series", "unknown-series"],
)
def test_bad_tests_are_dead_letters(tmp_path, bad, reason, mentions):
    records = [good(1), good(2), bad, good(3)]
    run = Run(tmp_path, records)
    assert run.counts == {"applied": 3, "skipped": 0, "dead_letter": 1}
    assert run.trace[2]["outcome"].reason == reason
    [letter] = run.letters()
    assert letter.reason == reason and letter.stream == STREAM
    assert base64.b64decode(letter.original_base64) == bad
    assert (letter.source.partition, letter.source.offset) == (0, 2)
    for text in mentions:
        assert text in letter.message, f"{letter.message!r} should mention {text!r}"
    # no cloud changed, nothing written; the next good record applies on top
    assert run.trace[2]["cloud"] == run.trace[1]["cloud"]
    assert run.trace[2]["files"] == run.trace[1]["files"]
    assert run.registry.get_sample_value("casecloud_messages_dead_lettered_total", {"reason": reason}) == 1.0


def test_a_past_positivity_value_is_late(tmp_path):
    # Positivity is a snapshot of current prevalence: the particles keep no past
    # compartment states to weigh a past share against.
    run = Run(tmp_path, [good(4), good(5), msg(3, {"lab_positive": 7}, {"lab_positive": 200}), good(6)])
    assert [o.status for o in (t["outcome"] for t in run.trace)] == ["applied", "applied", "dead_letter", "applied"]
    [letter] = run.letters()
    assert letter.reason == "late" and "positivity snapshot" in letter.message


def test_the_same_positives_out_of_other_tests_are_not_a_duplicate(tmp_path):
    """A re-sent positivity value with the same positives but another number of tests is another
    observation (another share positive): for a report-dated series it is a dead letter
    ``not_revisable`` naming both test counts, and the cloud is left as it was; the same positives
    out of the same tests are a duplicate (skipped). Bug caught: duplicates told apart by the
    positives alone (the new share silently dropped as a duplicate)."""
    same = msg(5, {"cases": 10, "lab_positive": 11}, {"lab_positive": 300})
    other = msg(5, {"cases": 10, "lab_positive": 11}, {"lab_positive": 450})
    run = Run(tmp_path / "live", [good(4), same, same, other, good(6)])
    assert [t["outcome"].status for t in run.trace] == ["applied", "applied", "skipped", "dead_letter", "applied"]
    [letter] = run.letters()
    assert letter.reason == "not_revisable" and base64.b64decode(letter.original_base64) == other
    assert "11 positives out of 300 tests" in letter.message and "11 positives out of 450 tests" in letter.message
    assert run.trace[3]["cloud"] == run.trace[2]["cloud"] and run.trace[3]["files"] == run.trace[2]["files"]
    # the tests behind assimilated positives survive a restart (they live in the checkpoint)
    Run(tmp_path / "restart", [good(4), same])
    again = Run(tmp_path / "restart", [good(4), same, other])  # the first two were applied before the restart
    assert again.counts["applied"] == 0 and again.counts["dead_letter"] == 1
    assert [x.reason for x in again.letters()] == ["not_revisable"]
