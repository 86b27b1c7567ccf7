"""Wastewater samples through the real service loop.

The stream runs ``tests/filters/specs/sir_wastewater.toml`` (daily ``cases``; two
sewage sites ``ww_east`` and ``ww_west``, the latter with a reference flow).
Samples travel in ``concentrations`` next to ``counts``: ``{"value": 4.1e3,
"lod": 150.0, "flow": 2.2e7}``, ``value`` null when not detected. Each bad record
must become one dead letter with its reason and exact bytes, leave the cloud and
the checkpoint files as they were, and the next good record must be applied.

===========================================  ==========================================  =====================
bad input                                    example                                     reason
===========================================  ==========================================  =====================
negative concentration                       ``{"value": -4.0}``                         ``bad_concentration``
not a number                                 ``{"value": "12"}``                         ``bad_concentration``
non-finite (too large to be a float)         ``{"value": 1e999}``                        ``malformed_json``
limit of detection 0 or negative             ``{"value": 40.0, "lod": 0}``               ``bad_concentration``
not detected, or 0, without a limit          ``{"value": null}``, ``{"value": 0}``       ``bad_concentration``
a flow of 0                                  ``{"value": 40.0, "flow": 0}``              ``bad_concentration``
a flow for a site without reference_flow     ``ww_east`` with ``"flow": 2e7``            ``bad_concentration``
a concentration for a count series           ``concentrations: {cases: {...}}``          ``series_kind``
a count for a concentration series           ``counts: {ww_east: 4100}``                 ``series_kind``
the same series in both                      ``ww_east`` in counts and concentrations    ``schema``
===========================================  ==========================================  =====================
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

SPEC = Path(__file__).parents[1] / "filters" / "specs" / "sir_wastewater.toml"
STREAM = "pellbrook.sewage"
START = dt.date(2026, 1, 1)
TODAY = dt.date(2026, 3, 1)


def msg(d: int, counts: dict[str, Any] | None = None, concentrations: Any = None) -> bytes:
    body: dict[str, Any] = {"stream": STREAM, "period": (START + dt.timedelta(days=d)).isoformat(), "counts": counts or {}}
    if concentrations is not None:
        body["concentrations"] = concentrations
    return orjson.dumps(body)


def good(d: int) -> bytes:
    return msg(d, {"cases": 4 + d}, {"ww_east": {"value": 60.0 * d, "lod": 20.0},
                                     "ww_west": {"value": 30.0 * d, "lod": 20.0, "flow": 2.2e7}})


class Run:
    def __init__(self, root: Path, records: list[bytes], **stream: Any) -> None:
        config = DeploymentConfig.model_validate(
            {
                "service": {"seed": 3, "checkpoint_dir": str(root / "checkpoints"), "keep_checkpoints": 100},
                "metrics": {"enabled": False},
                "streams": [{"id": STREAM, "model": str(SPEC), "start": START.isoformat(), "particles": 200,
                             "forecast_trajectories": 20, "forecast_horizon_days": 7, **stream}],
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

    def estimates(self) -> list[EstimateMessage]:
        return [EstimateMessage.model_validate(orjson.loads(r.value)) for r in self.transport.published["estimates"]]

    def letters(self) -> list[DeadLetter]:
        return [DeadLetter.model_validate(orjson.loads(r.value)) for r in self.transport.published["dead_letters"]]


def test_samples_counts_and_non_detects_are_assimilated(tmp_path):
    records = [good(1), good(2), msg(3, None, {"ww_east": {"value": None, "lod": 20.0}}),  # wastewater only, not detected
               msg(4, {"cases": 9}, {"ww_west": {"value": 7.5, "lod": 20.0}}), good(5)]
    run = Run(tmp_path, records)
    assert run.counts == {"applied": 5, "skipped": 0, "dead_letter": 0}
    est = run.estimates()
    assert [e.day for e in est] == [1, 2, 3, 4, 5]
    assert all(e.log_evidence_increment is not None and np.isfinite(e.log_evidence_increment) for e in est)
    # concentrations are forecast like any series (expected level with log-scale noise)
    forecast = est[-1].forecast
    assert forecast is not None and set(forecast["series"]) == {"cases", "ww_east", "ww_west"}


def test_an_alert_rule_watches_the_wastewater_level(tmp_path):
    # "P(the level at the east site passes 500 copies/l within 7 days)": the exceedance of
    # a concentration series, raised like any alert (the closed form of this probability is
    # checked in tests/filters/test_evidence_forecasts.py). Bug caught: concentration
    # series missing from the forecast the alert rules read.
    records = [msg(d, {"cases": 5 * d}, {"ww_east": {"value": 80.0 * d, "lod": 20.0}}) for d in range(1, 6)]
    rule = {"name": "ww_high", "series": "ww_east", "threshold": 500.0, "horizon_days": 7}
    run = Run(tmp_path, records, alerts=[rule])
    probabilities = [e.exceedance["ww_high"].probability for e in run.estimates()]
    assert all(0 <= p <= 1 for p in probabilities) and probabilities[-1] > 0.9
    alerts = [orjson.loads(r.value) for r in run.transport.published["alerts"]]
    assert alerts[0]["status"] == "raised" and alerts[0]["series"] == "ww_east" and alerts[0]["latest_mean"] > 0


def test_a_late_sample_inside_the_window_is_assimilated(tmp_path):
    # Infections are in every particle's history, so a sample for day 3 arriving after
    # day 5 is weighed against each particle's own path (window 3 days).
    run = Run(tmp_path, [good(4), good(5), msg(3, None, {"ww_east": {"value": 150.0, "lod": 20.0}}), good(6)])
    assert run.counts == {"applied": 4, "skipped": 0, "dead_letter": 0}
    assert run.estimates()[2].day == 3 and run.estimates()[2].cloud_day == 5


def test_the_limit_decides_what_a_low_value_means(tmp_path):
    # 5.0 measured is a value; 5.0 under a limit of 20 only says "below 20", the same
    # evidence as a non-detect. Bug caught: the lod dropped between message and Report.
    def evidence(sample: dict[str, Any], sub: str) -> float:
        run = Run(tmp_path / sub, [msg(1, None, {"ww_east": sample})])
        return orjson.loads(run.transport.published["estimates"][0].value)["log_evidence_increment"]

    measured = evidence({"value": 5.0}, "a")
    censored = evidence({"value": 5.0, "lod": 20.0}, "b")
    not_detected = evidence({"value": None, "lod": 20.0}, "c")
    assert censored == not_detected != measured


@pytest.mark.parametrize(
    ("bad", "reason", "mentions"),
    [
        (msg(3, None, {"ww_east": {"value": -4.0}}), "bad_concentration", ["concentrations.ww_east.value", "-4.0", "greater than or equal to 0"]),
        (msg(3, None, {"ww_east": {"value": "12"}}), "bad_concentration", ["concentrations.ww_east.value", "'12'", "valid number"]),
        (msg(3, None, {"ww_east": {"value": 40.0, "lod": 0}}), "bad_concentration", ["concentrations.ww_east.lod", "greater than 0"]),
        (msg(3, None, {"ww_east": {"value": 40.0, "lod": -1.5}}), "bad_concentration", ["concentrations.ww_east.lod", "-1.5"]),
        (msg(3, None, {"ww_east": {"value": None}}), "bad_concentration", ["concentrations.ww_east", "without 'lod'"]),
        (msg(3, None, {"ww_east": {"value": 0}}), "bad_concentration", ["concentrations.ww_east", "value 0.0 without 'lod'"]),
        (msg(3, None, {"ww_west": {"value": 40.0, "flow": 0}}), "bad_concentration", ["concentrations.ww_west.flow", "greater than 0"]),
        (msg(3, None, {"ww_east": {"value": 40.0, "flow": 2e7}}), "bad_concentration", ["'ww_east'", "no reference_flow"]),
        (msg(3, {"cases": 3}, {"cases": {"value": 3.0}}), "schema", ["both in 'counts' and in 'concentrations'"]),
        (msg(3, None, {"cases": {"value": 3.0}}), "series_kind", ["concentrations.cases", "send it in 'counts'"]),
        (msg(3, {"ww_east": 4100}), "series_kind", ["counts.ww_east", "concentration series"]),
        (msg(3, None, {"ww_south": {"value": 3.0}}), "unknown_series", ["ww_south"]),
        (b'{"stream":"pellbrook.sewage","period":"2026-01-04","counts":{},"concentrations":{"ww_east":{"value":1e999}}}',
         "malformed_json", ["not valid JSON"]),
        (msg(3, None, None), "schema", ["at least 1 series"]),
    ],
    ids=["negative", "string", "lod-zero", "lod-negative", "null-no-lod", "zero-no-lod", "flow-zero",
         "flow-without-reference", "both", "count-series", "concentration-series", "unknown", "non-finite", "empty"],
)
def test_bad_samples_are_dead_letters(tmp_path, bad, reason, mentions):
    run = Run(tmp_path, [good(1), good(2), bad, good(3)])
    assert run.counts == {"applied": 3, "skipped": 0, "dead_letter": 1}
    assert run.trace[2]["outcome"].reason == reason
    [letter] = run.letters()
    assert letter.reason == reason
    assert base64.b64decode(letter.original_base64) == bad
    assert (letter.source.partition, letter.source.offset) == (0, 2)
    for text in mentions:
        assert text in letter.message, f"{letter.message!r} should mention {text!r}"
    assert run.trace[2]["cloud"] == run.trace[1]["cloud"]
    assert run.trace[2]["files"] == run.trace[1]["files"]
    assert run.registry.get_sample_value("casecloud_messages_dead_lettered_total", {"reason": reason}) == 1.0


def test_the_same_level_at_another_flow_or_limit_is_not_a_duplicate(tmp_path):
    """A re-sent sample with the same level but another flow (or limit of detection) is another
    measurement: a dead letter ``not_revisable`` naming both, the cloud untouched; the very same
    sample again is a duplicate (skipped). The (lod, flow) of assimilated samples survive a
    restart. Bug caught: duplicates told apart by the level alone (a corrected flow silently
    dropped as a duplicate)."""
    same = msg(5, {"cases": 10}, {"ww_west": {"value": 150.0, "lod": 20.0, "flow": 2.2e7}})
    other_flow = msg(5, {"cases": 10}, {"ww_west": {"value": 150.0, "lod": 20.0, "flow": 3.0e7}})
    other_lod = msg(5, {"cases": 10}, {"ww_west": {"value": 150.0, "lod": 40.0, "flow": 2.2e7}})
    run = Run(tmp_path / "live", [good(4), same, same, other_flow, other_lod, good(6)])
    assert [t["outcome"].status for t in run.trace] == ["applied", "applied", "skipped", "dead_letter", "dead_letter", "applied"]
    first, second = run.letters()
    assert first.reason == second.reason == "not_revisable" and base64.b64decode(first.original_base64) == other_flow
    assert "(20.0, 22000000.0)" in first.message and "(20.0, 30000000.0)" in first.message
    assert "(20.0, 22000000.0)" in second.message and "(40.0, 22000000.0)" in second.message
    assert run.trace[4]["cloud"] == run.trace[2]["cloud"] and run.trace[4]["files"] == run.trace[2]["files"]
    Run(tmp_path / "restart", [good(4), same])
    again = Run(tmp_path / "restart", [good(4), same, other_flow])
    assert again.counts == {"applied": 0, "skipped": 0, "dead_letter": 1}
    assert [x.reason for x in again.letters()] == ["not_revisable"]
