"""The file transport and the commands built on it (replay, demo, checkpoint verify)."""

from __future__ import annotations

import asyncio
import datetime as dt
import os
from pathlib import Path

import orjson
import pytest
from prometheus_client import CollectorRegistry

from service import cli
from service.runtime.app import Service
from service.analysis.demo import CAUTION
from service.runtime.metrics import Metrics
from service.transports import FileTransport, OutRecord
from service.transports import files as files_module


def _lines(path: Path) -> list[dict]:
    return [orjson.loads(line) for line in path.read_bytes().splitlines() if line]


def test_reads_ndjson_with_line_offsets_and_crlf(tmp_path):
    src = tmp_path / "in.ndjson"
    src.write_bytes(b'{"a": 1}\r\n{"b": 2}\n\r\n{"c": 3}')  # CRLF, LF, an empty CRLF line, no final newline
    transport = FileTransport(src, tmp_path / "out")

    async def read_all():
        await transport.start()
        got = []
        while (record := await transport.receive(timeout=0.01)) is not None:
            got.append(record)
        exhausted = transport.exhausted
        await transport.stop()
        return got, exhausted

    got, exhausted = asyncio.run(read_all())
    assert [(r.offset, r.value) for r in got] == [(0, b'{"a": 1}'), (1, b'{"b": 2}'), (2, b""), (3, b'{"c": 3}')]
    assert all(r.topic == src.name and r.partition == 0 for r in got)  # the name: independent of the working directory
    assert exhausted


def test_publishes_one_json_per_line_to_three_files(tmp_path):
    out = tmp_path / "out"
    transport = FileTransport(tmp_path / "none.ndjson", out)
    (tmp_path / "none.ndjson").write_bytes(b"")
    records = [
        OutRecord("estimates", b"s", b'{"n": 1}'),
        OutRecord("alerts", b"s", b'{"n": 2}'),
        OutRecord("estimates", b"s", b'{"n": 3}'),
        OutRecord("dead_letters", None, b'{"n": 4}'),
    ]

    async def go():
        await transport.start()
        await transport.publish(records[:2])
        await transport.publish(records[2:])
        await transport.stop()

    asyncio.run(go())
    assert _lines(out / "estimates.ndjson") == [{"n": 1}, {"n": 3}]
    assert _lines(out / "alerts.ndjson") == [{"n": 2}]
    assert _lines(out / "dead_letters.ndjson") == [{"n": 4}]
    assert (out / "estimates.ndjson").read_bytes() == b'{"n": 1}\n{"n": 3}\n'


def test_commit_file_is_atomic_and_used_to_resume(tmp_path, monkeypatch):
    src = tmp_path / "in.ndjson"
    src.write_bytes(b"".join(b'{"i": %d}\n' % i for i in range(5)))
    out = tmp_path / "out"
    replaced: list[tuple[Path, Path, bytes]] = []
    real_replace = os.replace

    def spy(a, b):
        replaced.append((Path(a), Path(b), Path(a).read_bytes()))
        real_replace(a, b)

    monkeypatch.setattr(files_module.os, "replace", spy)

    async def first_run():
        t = FileTransport(src, out)
        await t.start()
        r0, r1 = await t.receive(), await t.receive()
        await t.commit(r0)
        await t.commit(r1)
        await t.stop()

    asyncio.run(first_run())
    commit_path = out / "committed.json"
    assert orjson.loads(commit_path.read_bytes()) == {src.name: 2}
    # written to a temporary file in the same directory, then renamed over the commit file
    assert [(a.parent, b) for a, b, _ in replaced] == [(out, commit_path)] * 2
    assert all(a != b and not a.exists() for a, b, _ in replaced)
    assert orjson.loads(replaced[-1][2]) == {src.name: 2}
    assert sorted(p.name for p in out.iterdir()) == ["alerts.ndjson", "committed.json", "dead_letters.ndjson", "estimates.ndjson"]

    async def resume(on_assign=None):
        t = FileTransport(src, out)
        await t.start(on_assign=on_assign)
        r = await t.receive()
        await t.stop()
        return r

    assert asyncio.run(resume()).offset == 2  # from the commit file

    async def hook_says_1(assigned):
        assert assigned == [(src.name, 0)]
        return {(src.name, 0): 1}

    async def hook_says_nothing(assigned):
        return {}

    assert asyncio.run(resume(hook_says_1)).offset == 1  # the checkpoints win over the commit file
    assert asyncio.run(resume(hook_says_nothing)).offset == 2
    # commits of another input file in the same output directory are kept apart
    other = tmp_path / "other.ndjson"
    other.write_bytes(b"{}\n")

    async def other_file():
        t = FileTransport(other, out)
        await t.start()
        r = await t.receive()
        await t.commit(r)
        await t.stop()
        return r

    assert asyncio.run(other_file()).offset == 0
    assert orjson.loads(commit_path.read_bytes()) == {src.name: 2, other.name: 1}


def test_unreadable_commit_file_is_a_transport_error(tmp_path):
    from service.errors import TransportError

    src = tmp_path / "in.ndjson"
    src.write_bytes(b"{}\n")
    out = tmp_path / "out"
    out.mkdir()
    (out / "committed.json").write_bytes(b"{not json")
    transport = FileTransport(src, out)

    async def go():
        try:
            await transport.start()
        finally:
            await transport.stop()

    with pytest.raises(TransportError, match="committed.json"):
        asyncio.run(go())


def test_service_over_files_with_crlf_input(tmp_path, kit):
    src = tmp_path / "in.ndjson"
    src.write_bytes(kit.obs(3) + b"\r\n" + b"{broken\r\n" + kit.obs(4) + b"\r\n")
    out = tmp_path / "out"
    config = kit.make_config(tmp_path / "ck")
    service = Service(config, FileTransport(src, out), metrics=Metrics(registry=CollectorRegistry()), today=lambda: kit.TODAY)
    assert asyncio.run(service.run(until_exhausted=True)) == {"applied": 2, "skipped": 0, "dead_letter": 1}
    estimates = _lines(out / "estimates.ndjson")
    assert [e["period"] for e in estimates] == [kit.period(3), kit.period(4)]
    assert [e["source"]["offset"] for e in estimates] == [0, 2]
    (letter,) = _lines(out / "dead_letters.ndjson")
    assert letter["reason"] == "malformed_json" and letter["source"]["offset"] == 1
    assert orjson.loads((out / "committed.json").read_bytes()) == {src.name: 3}


# ----------------------------------------------------------------------- CLI
REPLAY_CONFIG = """\
transport = "file"

[service]
seed = 5
checkpoint_dir = "ck"

[metrics]
enabled = true   # replay turns the HTTP endpoint off
port = 0

[[streams]]
id = "region-north.ed"
model = "sir"
start = "2024-01-01"
particles = 200
forecast_trajectories = 20

[[streams.alerts]]
name = "cases_high"
series = "cases"
threshold = 30
"""


def test_replay_command(tmp_path, capsys):
    conf = tmp_path / "casecloud.toml"
    conf.write_text(REPLAY_CONFIG, encoding="utf-8")
    start = dt.date(2024, 1, 1)
    good = [
        orjson.dumps({"stream": "region-north.ed", "period": (start + dt.timedelta(days=d)).isoformat(), "counts": {"cases": 2 + d}})
        for d in range(1, 8)
    ]
    src = tmp_path / "feed.ndjson"
    src.write_bytes(b"\n".join(good[:3] + [b'{"stream": "region-north.ed", "counts": 5}'] + good[3:]) + b"\n")
    out = tmp_path / "replay-out"

    assert cli.main(["replay", "--config", str(conf), "--input", str(src), "--out", str(out)]) == 0
    estimates = _lines(out / "estimates.ndjson")
    assert [e["period"] for e in estimates] == [orjson.loads(g)["period"] for g in good]
    assert all(set(e["exceedance"]) == {"cases_high"} for e in estimates)
    assert [d["reason"] for d in _lines(out / "dead_letters.ndjson")] == ["schema"]
    assert (tmp_path / "ck").is_dir()  # relative to the config file
    counts = orjson.loads(capsys.readouterr().err.strip().splitlines()[-1])
    assert counts == {"applied": 7, "skipped": 0, "dead_letter": 1}

    # replaying the same input again resumes after the last applied record: nothing twice
    assert cli.main(["replay", "--config", str(conf), "--input", str(src), "--out", str(out)]) == 0
    assert len(_lines(out / "estimates.ndjson")) == 7


def test_replay_with_invalid_config_exits_2(tmp_path, capsys):
    conf = tmp_path / "bad.toml"
    conf.write_text('transport = "carrier-pigeon"\n', encoding="utf-8")
    with pytest.raises(SystemExit) as info:
        cli.main(["replay", "--config", str(conf), "--input", str(tmp_path / "x"), "--out", str(tmp_path / "o")])
    assert info.value.code == 2
    assert "carrier-pigeon" in capsys.readouterr().err


def test_demo_command_and_checkpoint_verify(tmp_path, capsys):
    out = tmp_path / "demo"
    assert cli.main(["demo", "--out", str(out), "--days", "40", "--particles", "300", "--quiet"]) == 0
    printed = capsys.readouterr().out

    estimates = _lines(out / "estimates.ndjson")
    # One per applied record (the ED feed daily, per band on Sundays; lab totals on Wednesdays), none
    # twice across the restart: every step once, the cloud never moving back, reaching each of days 1..40.
    assert [e["step"] for e in estimates] == list(range(1, len(estimates) + 1))
    cloud_days = [e["cloud_day"] for e in estimates]
    assert cloud_days == sorted(cloud_days) and sorted(set(cloud_days)) == list(range(1, 41))
    dead = _lines(out / "dead_letters.ndjson")
    assert sorted(d["reason"] for d in dead) == ["bad_count", "malformed_json"]  # the truncated line, the -3
    negative = next(d for d in dead if d["reason"] == "bad_count")
    assert "-3" in negative["message"] and "ed_child" in negative["message"]
    summary = (out / "summary.txt").read_text(encoding="utf-8")
    assert CAUTION in summary and CAUTION in printed
    assert "public-health judgement" in summary
    checkpoints = out / "checkpoints"
    assert any(checkpoints.rglob("*.ckpt"))

    assert cli.main(["checkpoint", "verify", "--checkpoint-dir", str(checkpoints)]) == 0
    report = capsys.readouterr().out
    assert "CORRUPT" not in report and "\tok" in report

    newest = max(checkpoints.rglob("*.ckpt"))
    data = bytearray(newest.read_bytes())
    data[len(data) // 2] ^= 0xFF
    newest.write_bytes(bytes(data))
    assert cli.main(["checkpoint", "verify", "--checkpoint-dir", str(checkpoints)]) != 0
    report = capsys.readouterr().out
    assert f"{newest}\tCORRUPT" in report
