"""Bad input never crashes the service and never changes a cloud.

Every case runs the real service loop (``Service.run(until_exhausted=True)``
over a ``MemoryTransport``) on the feed ``good, good, BAD, good`` for one
stream (start 2026-01-01, "today" fixed at 2026-03-01, at most 2 days ahead
allowed). For the bad record we check: exactly one dead letter with the
expected reason; its ``original_base64`` is the exact bytes sent; its
``source`` is the record's topic/partition/offset; its message names the
offending field or value; the offset is committed; the
``casecloud_messages_dead_lettered_total{reason=...}`` counter moved by one;
the stream's in-memory cloud (filter arrays, header with RNG state, last
period, positions, alert state) and its checkpoint files are identical before
and after; and the next good record is applied.

=========================================  ============================  ================
kind of bad input                          example                       what it gets
=========================================  ============================  ================
malformed JSON (truncated, garbage,        ``{"stream": "r", "peri``     ``malformed_json``
invalid UTF-8, empty line)
JSON ``NaN`` literal (not JSON)            ``"cases": NaN``              ``malformed_json``
valid JSON that is not an object           ``[1, 2, 3]``, ``42``         ``schema``
missing field / extra field / wrong type   no ``period``; ``"x": 1``     ``schema``
negative count                             ``"cases": -3``               ``bad_count``
fractional count                           ``"cases": 2.5``              ``bad_count``
(a whole number with a decimal point,      ``"cases": 12.0``             applied as 12
``12.0``, is a count: not bad input)
the string ``"NaN"`` as a count            ``"cases": "NaN"``            ``bad_count``
absurd count (> 1e9)                       ``5000000000``, ``1e30``      ``bad_count``
unknown stream                             ``"stream": "region-south"``  ``unknown_stream``
unknown series (or not a series name)      ``"deaths": 2``               ``unknown_series``
bad period                                 ``2026-02-30``, ``2026-W60``  ``bad_period``
period before the stream's start           ``2025-12-31``                ``bad_period``
gap longer than ``max_gap_days``           60 days on, limit 10          ``bad_period``
period after today + ``max_future_days``   ``2026-03-04``                ``future``
oversized (> ``max_message_bytes``)        600 bytes, limit 512          ``oversized``
late (older than the assimilation window;  day 3 after day 5             ``late``
the sir example's window is 0 days)
as-of date before the period               period day 6, as of day 5     ``bad_as_of``
as-of date after today + max_future_days   ``"as_of": "2026-03-09"``     ``bad_as_of``
as-of that is not a calendar date          ``"as_of": "2026-02-30"``     ``schema``
weekly period for a daily series           ``2026-W02`` for ``cases``    ``cadence``
a series twice in one message              ``{"cases": 3, "cases": 4}``  ``duplicate_series``
another total for a period already         day 5 again, 99 instead of 10 ``not_revisable``
assimilated, series dated by report
=========================================  ============================  ================

Revisions of event-dated series (``lower_total``, ``conflicting_vintage``, a stale
vintage skipped) need a series counted by event date: see test_real_feeds.py.

(A re-sent period is *skipped*, not dead-lettered, and a re-delivered offset
is skipped as already applied: see test_order_and_restart.py.)
"""

from __future__ import annotations

import base64
import json
from pathlib import Path

import jsonschema
import orjson
import pytest

import schemas
from schemas import DeadLetter

BAD_OFFSET = 2


def run_case(harness, kit, bad: bytes, reason: str, mentions: list[str], before=None, after=None, **config):
    before = before if before is not None else [kit.obs(4), kit.obs(5)]
    after = after if after is not None else kit.obs(6)
    assert len(before) == BAD_OFFSET
    h = harness([*before, bad, after], **config)
    counts = h.run()

    # the loop went through every record: nothing escaped, the service kept going
    assert counts == {"applied": 3, "skipped": 0, "dead_letter": 1}
    assert [t["outcome"].status for t in h.trace] == ["applied", "applied", "dead_letter", "applied"]
    assert h.trace[BAD_OFFSET]["outcome"].reason == reason

    # exactly one dead letter, carrying the reason, the exact bytes and the position
    letters = h.transport.published["dead_letters"]
    assert len(letters) == 1
    letter = DeadLetter.model_validate(orjson.loads(letters[0].value))
    assert letter.reason == reason
    assert base64.b64decode(letter.original_base64, validate=True) == bad
    assert (letter.source.topic, letter.source.partition, letter.source.offset) == ("input", 0, BAD_OFFSET)
    for text in mentions:
        assert text in letter.message, f"dead-letter message {letter.message!r} should mention {text!r}"
    headers = dict(letters[0].headers)
    assert headers["ce_type"] == b"invalid.casecloud.dead_letter.v1"
    # the type names the same unowned domain as the schema id (RFC 2606 .invalid)
    assert headers["ce_dataschema"] == b"https://schemas.casecloud.invalid/dead_letter.v1.json"
    assert headers["ce_subject"] == reason.encode()

    # its offset is committed
    assert h.trace[BAD_OFFSET]["committed"] == BAD_OFFSET + 1
    assert h.transport.committed == BAD_OFFSET + 2

    # the dead-letter counter moved by one, under this reason only
    assert h.sample("casecloud_messages_dead_lettered_total", {"reason": reason}) == 1.0
    others = [
        s
        for metric in h.registry.collect()
        if metric.name == "casecloud_messages_dead_lettered"
        for s in metric.samples
        if s.name.endswith("_total") and s.labels["reason"] != reason
    ]
    assert all(s.value == 0 for s in others)

    # no cloud changed: memory and checkpoint files identical before and after
    prev, cur = h.trace[BAD_OFFSET - 1], h.trace[BAD_OFFSET]
    assert prev["cloud"] is not None and prev["files"]
    assert cur["cloud"] == prev["cloud"]
    assert cur["files"] == prev["files"]

    # and the next good record is applied on top of the untouched cloud
    nxt = h.trace[BAD_OFFSET + 1]
    assert nxt["cloud"]["header"]["step"] == prev["cloud"]["header"]["step"] + 1
    assert nxt["cloud"]["last_period"] == orjson.loads(after)["period"]
    estimates = [orjson.loads(r.value) for r in h.transport.published["estimates"]]
    assert [e["source"]["offset"] for e in estimates] == [0, 1, 3]
    assert h.sample("casecloud_messages_processed_total", {"stream": kit.STREAM}) == 3.0
    return letter


# --------------------------------------------------------------------- syntax
@pytest.mark.parametrize(
    "bad",
    [
        b'{"stream": "region-north.ed", "period": "2026-01-07", "coun',
        b'{"stream": "region-north.ed", "period": "2026-01-07", "counts": {"cases": 1}} trailing',
        b'{"stream": "region-north.\xff\xfe", "period": "2026-01-07", "counts": {"cases": 1}}',
        b"",
    ],
    ids=["truncated", "trailing-garbage", "invalid-utf8", "empty"],
)
def test_malformed_json(harness, kit, bad):
    run_case(harness, kit, bad, "malformed_json", ["not valid JSON"])


@pytest.mark.parametrize("bad", [b"[1, 2, 3]", b'"hello"', b"42", b"null", b"true"])
def test_valid_json_that_is_not_an_object(harness, kit, bad):
    run_case(harness, kit, bad, "schema", ["valid dictionary"])


# --------------------------------------------------------------------- schema
@pytest.mark.parametrize(
    ("message", "mentions"),
    [
        ({"stream": "region-north.ed", "counts": {"cases": 3}}, ["period", "Field required"]),
        ({"stream": "region-north.ed", "period": "2026-01-07"}, ["counts", "Field required"]),
        (
            {"stream": "region-north.ed", "period": "2026-01-07", "counts": {"cases": 3}, "region": "north"},
            ["region", "Extra inputs are not permitted"],
        ),
        ({"stream": 17, "period": "2026-01-07", "counts": {"cases": 3}}, ["stream", "valid string", "17"]),
        ({"stream": "region-north.ed", "period": "2026-01-07", "counts": [3]}, ["counts", "valid dictionary"]),
        ({"stream": "region-north.ed", "period": "2026-01-07", "counts": {}}, ["counts", "at least 1"]),
        (
            {"stream": "region-north.ed", "period": "2026-01-07", "counts": {"cases": 3}, "metadata": {"feed": 5}},
            ["metadata.feed", "valid string"],
        ),
    ],
    ids=["missing-period", "missing-counts", "extra-field", "stream-not-string", "counts-list", "counts-empty", "metadata-type"],
)
def test_schema_violation(harness, kit, message, mentions):
    run_case(harness, kit, orjson.dumps(message), "schema", mentions)


# --------------------------------------------------------------------- counts
def test_negative_count(harness, kit):
    run_case(harness, kit, kit.obs(6, -3), "bad_count", ["counts.cases", "-3", "greater than or equal to 0"])


def test_fractional_count(harness, kit):
    run_case(harness, kit, kit.obs(6, 2.5), "bad_count", ["counts.cases", "2.5", "valid integer"])


def test_a_whole_number_written_with_a_decimal_point_is_that_count(tmp_path, kit):
    # Our published JSON Schema says "integer", and JSON Schema's "integer" is any number with a
    # zero fractional part (JSON Schema 2020-12 core, the instance data model; the wording is from
    # memory, the verdict below is the jsonschema library's): 12.0, as a feed exported from a
    # float column writes it, is valid under our own contract. Bug caught: the service
    # dead-lettering as bad_count a message its contract accepts. 12.0 is applied exactly as 12.
    schema = json.loads((Path(schemas.__file__).parent / "json" / "observation.json").read_text(encoding="utf-8"))
    contract = jsonschema.Draft202012Validator(schema)
    runs = {}
    for name, count in [("int", b"12"), ("float", b"12.0"), ("exponent", b"1.2e1")]:
        record = b'{"stream":"%s","period":"%s","counts":{"cases":%s}}' % (kit.STREAM.encode(), kit.period(6).encode(), count)
        assert contract.is_valid(orjson.loads(record))
        h = kit.Harness(tmp_path / name, [kit.obs(4), kit.obs(5), record])
        assert h.run() == {"applied": 3, "skipped": 0, "dead_letter": 0}
        runs[name] = (h.trace[-1]["cloud"], [r.value for r in h.transport.published["estimates"]])
    assert runs["float"] == runs["int"] and runs["exponent"] == runs["int"]


def test_nan_literal_is_malformed_json(harness, kit):
    # JSON has no NaN: the literal is a syntax error, not a count
    bad = b'{"stream": "region-north.ed", "period": "2026-01-07", "counts": {"cases": NaN}}'
    run_case(harness, kit, bad, "malformed_json", ["not valid JSON"])


def test_nan_string_is_bad_count(harness, kit):
    run_case(harness, kit, kit.obs(6, "NaN"), "bad_count", ["counts.cases", "'NaN'"])


@pytest.mark.parametrize(
    ("bad", "shown"),
    [
        (b'{"stream":"region-north.ed","period":"2026-01-07","counts":{"cases":5000000000}}', "5000000000"),
        (b'{"stream":"region-north.ed","period":"2026-01-07","counts":{"cases":1000000000000000000000000000000}}', "1e+30"),
        (b'{"stream":"region-north.ed","period":"2026-01-07","counts":{"cases":1e12}}', "1000000000000"),
    ],
    ids=["5e9", "1e30-integer-literal", "1e12-float"],
)
def test_absurdly_large_count(harness, kit, bad, shown):
    run_case(harness, kit, bad, "bad_count", ["counts.cases", shown])


# ------------------------------------------------------------ what and where
def test_unknown_stream(harness, kit):
    letter = run_case(
        harness, kit, kit.obs(6, stream="region-south.ed"), "unknown_stream", ["'region-south.ed'", kit.STREAM]
    )
    assert letter.stream == "region-south.ed"


@pytest.mark.parametrize(
    ("counts", "mentions"),
    [({"deaths": 2}, ["deaths", "allowed", "cases"]), ({"cases": 3, "cases-total": 4}, ["cases-total"])],
    ids=["not-observed", "not-a-series-name"],
)
def test_unknown_series(harness, kit, counts, mentions):
    bad = orjson.dumps({"stream": kit.STREAM, "period": kit.period(6), "counts": counts})
    letter = run_case(harness, kit, bad, "unknown_series", mentions)
    assert letter.stream == kit.STREAM


@pytest.mark.parametrize("bad_period", ["not a date", "2026-02-30", "2026-W60", "2025-W53", "2026-1-7", "2026-01-07T00:00"])
def test_bad_period(harness, kit, bad_period):
    run_case(harness, kit, kit.obs(bad_period), "bad_period", ["period", repr(bad_period)])


def test_period_before_stream_start(harness, kit):
    run_case(harness, kit, kit.obs("2025-12-31"), "bad_period", ["2025-12-31", "before the stream's start 2026-01-01"])


def test_gap_longer_than_allowed(harness, kit):
    # day 40 is 35 days after the latest period (day 5) and not in the future; the limit is 10 days
    run_case(harness, kit, kit.obs(40), "bad_period", [kit.period(40), "35 days", "at most 10"], max_gap_days=10)


@pytest.mark.parametrize("future", ["2026-03-04", "2027-01-15", "2026-W11"])
def test_period_far_in_the_future(harness, kit, future):
    # today is 2026-03-01 and max_future_days is 2: the last allowed day is 2026-03-03
    run_case(harness, kit, kit.obs(future), "future", [future, "2026-03-03"])


def test_period_just_inside_the_future_limit_is_applied(harness, kit):
    # the boundary of the previous test: 2026-03-03 itself is allowed
    h = harness([kit.obs(4), kit.obs("2026-03-03")])
    assert h.run() == {"applied": 2, "skipped": 0, "dead_letter": 0}


def test_oversized_message(harness, kit):
    bad = kit.obs(6) + b" " * 600  # otherwise a perfectly good observation
    assert len(bad) > 512
    run_case(harness, kit, bad, "oversized", [f"{len(bad)} bytes", "512"], max_message_bytes=512)


def test_late_period(harness, kit):
    letter = run_case(harness, kit, kit.obs(3), "late", [kit.period(3), kit.period(5)])
    assert letter.stream == kit.STREAM


# ---------------------------------------------------------------- real feeds
def test_as_of_before_the_period(harness, kit):
    run_case(harness, kit, kit.obs(6, as_of=kit.period(5)), "bad_as_of", ["as_of", kit.period(5), "before period"])


def test_as_of_in_the_future(harness, kit):
    run_case(harness, kit, kit.obs(6, as_of="2026-03-09"), "bad_as_of", ["2026-03-09", "2026-03-03"])


def test_as_of_not_a_date(harness, kit):
    run_case(harness, kit, kit.obs(6, as_of="2026-02-30"), "schema", ["as_of", "2026-02-30"])


def test_weekly_period_for_a_daily_series(harness, kit):
    run_case(harness, kit, kit.obs("2026-W02"), "cadence", ["'cases'", "daily", "2026-W02"])


def test_a_series_twice_in_one_message(harness, kit):
    bad = b'{"stream":"' + kit.STREAM.encode() + b'","period":"' + kit.period(6).encode() + b'","counts":{"cases":3,"cases":4}}'
    run_case(harness, kit, bad, "duplicate_series", ["'cases'", "twice"])


def test_another_total_for_a_report_dated_series(harness, kit):
    run_case(harness, kit, kit.obs(5, cases=99), "not_revisable", ["'cases'", "10 was assimilated", "dated_by"])

