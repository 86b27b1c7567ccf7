"""A real Prometheus server scrapes a real ``casecloud serve`` process.

The service runs over the file transport (an NDJSON input: no broker needed)
with its metrics on 127.0.0.1 and a port it picks; Prometheus (Debian's
``prometheus`` binary) scrapes it every second, loads
``deploy/prometheus/casecloud-rules.yml`` and evaluates it every second. The
test reads everything back through Prometheus's HTTP API: the scraped
counters, the target's health, the rules' health, the recording rules'
output, and one alert that really fires (a filter collapse, whose counter is
born at its first increment: the case ``increase()`` alone cannot see).

The observations reach the service on its standard input in two parts: the
second part only after Prometheus has stored the first, so the step-latency
histogram grows inside the scraped window and its p95 must be a number (were
every step taken before the first scrape, the rate would be 0/0 = NaN and
prove nothing).

Both processes are killed at the end, also when the test fails.
"""

from __future__ import annotations

import json
import math
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.parse
import urllib.request
from pathlib import Path

import pytest
import yaml

pytestmark = pytest.mark.integration

REPO = Path(__file__).resolve().parents[2]
RULES = REPO / "deploy" / "prometheus" / "casecloud-rules.yml"
COLLAPSING, STEADY = "coastal-collapse", "inland-steady"
DAYS = 12
COLLAPSE_DAY = 8
FIRST_PART_DAYS = 4  # days sent before Prometheus has scraped; the rest after

# SIR in a town of 2000 with binomial reporting: a reported count above the
# day's new infections has probability zero under every particle, so an
# impossible count makes the filter collapse (a valid message, not a dead letter).
SPEC = """\
name = "sir_binomial_town"
description = "SIR, one small group, binomially thinned daily infections (test spec)."
substeps_per_day = 2
compartments = ["S", "I", "R"]

[[groups]]
name = "all"
population = 2000

[[flows]]
name = "infection"
from = "S"
to = "I"
rate = "beta * foi"
infection = true

[[flows]]
name = "recovery"
from = "I"
to = "R"
rate = "gamma"

[transmission]
infectious = { I = 1.0 }

[parameters.beta]
kind = "static"
prior = { dist = "uniform", low = 0.1, high = 0.6 }

[parameters.gamma]
kind = "fixed"
value = 0.25

[initial]
remainder = "S"
set = [{ compartment = "I", count = { dist = "uniform", low = 1, high = 10 } }]

[[series]]
name = "cases"
kind = "incidence"
flow = "infection"
reporting = 0.5
noise = { dist = "binomial" }
"""


def _tool(name: str) -> str:
    path = shutil.which(name)
    if path is None:
        pytest.fail(f"{name} is not installed: run `apt-get install -y prometheus` (Debian; .ci/run does)")
    return path


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _get_json(url: str) -> dict:
    with urllib.request.urlopen(url, timeout=5) as response:
        return json.loads(response.read())


def _status(url: str) -> int:
    with urllib.request.urlopen(url, timeout=2) as response:
        return response.status


def _stop(proc: subprocess.Popen | None, grace: float = 20) -> None:
    if proc is None or proc.poll() is not None:
        return
    proc.send_signal(signal.SIGTERM)
    try:
        proc.wait(grace)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(30)


def _tail(path: Path, n: int = 30) -> str:
    try:
        return "\n".join(path.read_text(errors="replace").splitlines()[-n:])
    except OSError as exc:
        return f"(no log at {path}: {exc})"


def _wait(predicate, timeout: float, what: str, logs: list[Path], procs: list[subprocess.Popen]):
    deadline = time.monotonic() + timeout
    last = None
    while time.monotonic() < deadline:
        for proc in procs:
            if proc.poll() is not None:
                raise AssertionError(f"{proc.args[0]} exited with {proc.returncode} while waiting for {what}\n"
                                     + "\n".join(f"--- {p.name} ---\n{_tail(p)}" for p in logs))
        try:
            last = predicate()
        except (OSError, ValueError, KeyError) as exc:  # not up yet / not answered yet
            last = exc
        else:
            if last:
                return last
        time.sleep(0.25)
    raise AssertionError(f"timed out after {timeout}s waiting for {what}; last answer: {last!r}\n"
                         + "\n".join(f"--- {p.name} ---\n{_tail(p)}" for p in logs))


def _observations(days: range) -> bytes:
    lines = []
    for day in days:
        period = f"2025-09-{day + 1:02d}"
        lines.append({"stream": STEADY, "period": period, "counts": {"cases": 0}})
        lines.append({"stream": COLLAPSING, "period": period, "counts": {"cases": 1500 if day == COLLAPSE_DAY else 0}})
    return b"".join(json.dumps(line).encode() + b"\n" for line in lines)


FIRST_PART = _observations(range(1, FIRST_PART_DAYS + 1))
SECOND_PART = (_observations(range(FIRST_PART_DAYS + 1, DAYS + 1))
               + b'{"stream": "inland-steady", "period": "2025-09-30", "counts": {"cases": 3\n')  # malformed


@pytest.fixture
def casecloud_service(tmp_path):
    """``casecloud serve`` over the file transport reading stdin; yields (port, out_dir, log, process).
    The first part of the observations is written at once; the test writes the rest."""
    (tmp_path / "sir_binomial_town.toml").write_text(SPEC)
    streams = "".join(
        f'\n[[streams]]\nid = "{s}"\nmodel = "sir_binomial_town.toml"\nstart = "2025-09-01"\n'
        f"particles = 200\nforecast_trajectories = 50\n"
        for s in (COLLAPSING, STEADY)
    )
    config = tmp_path / "deploy.toml"
    config.write_text(
        'transport = "file"\n\n[service]\nseed = 7\ncheckpoint_dir = "checkpoints"\n\n'
        '[metrics]\nhost = "127.0.0.1"\nport = 0\n\n'
        '[file]\noutput_dir = "out"\n' + streams
    )
    log = tmp_path / "casecloud.log"
    with open(log, "wb") as out:
        proc = subprocess.Popen(
            [sys.executable, "-m", "service.cli", "serve", "--config", str(config)],
            stdout=out, stderr=subprocess.STDOUT, stdin=subprocess.PIPE,
            env=dict(os.environ, PYTHONUNBUFFERED="1"), cwd=tmp_path,
        )
    proc.stdin.write(FIRST_PART)
    proc.stdin.flush()
    try:
        match = _wait(lambda: re.search(r"metrics on http://127\.0\.0\.1:(\d+)/metrics", log.read_text()),
                      60, "the service's metrics address", [log], [proc])
        yield int(match.group(1)), tmp_path / "out", log, proc
    finally:
        if not proc.stdin.closed:
            proc.stdin.close()
        _stop(proc)


@pytest.fixture
def prometheus_server(tmp_path, casecloud_service):
    """A Prometheus server scraping the service every second, with the rules loaded."""
    binary = _tool("prometheus")
    port, _out, service_log, service_proc = casecloud_service
    config = tmp_path / "prometheus.yml"
    config.write_text(yaml.safe_dump({
        "global": {"scrape_interval": "1s", "evaluation_interval": "1s", "scrape_timeout": "1s"},
        "rule_files": [str(RULES)],
        "scrape_configs": [{"job_name": "casecloud", "static_configs": [{"targets": [f"127.0.0.1:{port}"]}]}],
    }))
    log = tmp_path / "prometheus.log"
    proc = None
    try:
        for _attempt in range(3):  # a free port may be taken between picking and binding
            web = _free_port()
            with open(log, "ab") as out:
                proc = subprocess.Popen(
                    [binary, f"--config.file={config}", f"--storage.tsdb.path={tmp_path / 'tsdb'}",
                     f"--web.listen-address=127.0.0.1:{web}", "--log.level=info"],
                    stdout=out, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, cwd=tmp_path,
                )
            base = f"http://127.0.0.1:{web}"
            try:
                _wait(lambda: _status(f"{base}/-/ready") == 200,
                      60, "Prometheus to be ready", [log, service_log], [proc, service_proc])
                break
            except AssertionError:
                if proc.poll() is not None and "address already in use" in log.read_text():
                    continue
                raise
        else:
            raise AssertionError(f"Prometheus found no free port in 3 attempts:\n{_tail(log)}")
        yield base, log, proc
    finally:
        _stop(proc)


def _query(base: str, promql: str) -> list[dict]:
    answer = _get_json(f"{base}/api/v1/query?" + urllib.parse.urlencode({"query": promql}))
    assert answer["status"] == "success", answer
    return answer["data"]["result"]


def test_prometheus_scrapes_the_service_and_evaluates_the_rules(casecloud_service, prometheus_server):
    port, out_dir, service_log, service_proc = casecloud_service
    base, prom_log, prom_proc = prometheus_server
    logs, procs = [prom_log, service_log], [prom_proc, service_proc]

    # The first part is applied, and Prometheus has stored it, before the rest is sent.
    def processed() -> dict[str, float]:
        return {r["metric"]["stream"]: float(r["value"][1]) for r in _query(base, "casecloud_messages_processed_total")}

    first = {COLLAPSING: FIRST_PART_DAYS, STEADY: FIRST_PART_DAYS}
    _wait(lambda: processed() == first, 60, "the first part's counters in Prometheus", logs, procs)
    service_proc.stdin.write(SECOND_PART)
    service_proc.stdin.close()

    # The service applies every observation (the collapse included) and dead-letters the broken line.
    def applied() -> int:
        path = out_dir / "estimates.ndjson"
        return path.read_bytes().count(b"\n") if path.exists() else 0

    _wait(lambda: applied() == 2 * DAYS and (out_dir / "dead_letters.ndjson").stat().st_size > 0,
          120, f"{2 * DAYS} estimates and a dead letter", logs, procs)
    estimates = [json.loads(line) for line in (out_dir / "estimates.ndjson").read_text().splitlines()]
    collapsed = [(e["stream"], e["period"]) for e in estimates if e["collapsed"]]
    assert collapsed == [(COLLAPSING, f"2025-09-{COLLAPSE_DAY + 1:02d}")]

    # 1. The counter as Prometheus stored it, per stream, equals what the service wrote.
    got = _wait(lambda: (lambda p: p if p == {COLLAPSING: DAYS, STEADY: DAYS} else None)(processed()),
                60, "casecloud_messages_processed_total in Prometheus", logs, procs)
    assert got == {COLLAPSING: DAYS, STEADY: DAYS}
    (sample,) = _query(base, 'casecloud_messages_processed_total{stream="inland-steady"}')
    assert sample["metric"]["job"] == "casecloud" and sample["metric"]["instance"] == f"127.0.0.1:{port}"

    # 2. The target is up.
    targets = _get_json(f"{base}/api/v1/targets")["data"]["activeTargets"]
    (target,) = [t for t in targets if t["labels"]["job"] == "casecloud"]
    assert target["health"] == "up", target
    assert target["scrapeUrl"] == f"http://127.0.0.1:{port}/metrics"
    assert target["lastError"] == ""

    # 3. Every rule of the file is loaded and evaluates without error.
    expected = {
        (g["name"], r.get("alert") or r.get("record"))
        for g in yaml.safe_load(RULES.read_text())["groups"] for r in g["rules"]
    }

    def rules_ok():
        groups = _get_json(f"{base}/api/v1/rules")["data"]["groups"]
        seen = {(g["name"], r["name"]): r for g in groups for r in g["rules"]}
        ok = set(seen) == expected and all(r["health"] == "ok" for r in seen.values())
        return seen if ok else None

    seen = _wait(rules_ok, 60, "all rules loaded and healthy", logs, procs)
    assert all(r.get("lastError", "") == "" for r in seen.values())
    assert {r["type"] for r in seen.values()} == {"alerting", "recording"}

    # 4. Recording rules produce series with the labels the service exports.
    def recorded(name: str, label: str) -> set[str]:
        return {r["metric"][label] for r in _query(base, name)}

    _wait(lambda: recorded("stream:casecloud_stream_update_age_seconds:min", "stream") == {COLLAPSING, STEADY},
          60, "the update-age recording rule", logs, procs)
    _wait(lambda: recorded("reason:casecloud_messages_dead_lettered:rate30m", "reason") == {"malformed_json"},
          60, "the dead-letter recording rule", logs, procs)
    def p95_numbers():  # the rule is evaluated every second: wait for an evaluation after the second part
        result = _query(base, "stream:casecloud_step_duration_seconds:p95_rate10m")
        ok = len(result) == 2 and not any(math.isnan(float(r["value"][1])) for r in result)
        return result if ok else None

    p95 = _wait(p95_numbers, 60, "the step-latency recording rule to give numbers", logs, procs)
    assert {r["metric"]["stream"] for r in p95} == {COLLAPSING, STEADY}
    for r in p95:  # steps were taken inside the window (second part), so a duration, never NaN
        value = float(r["value"][1])
        assert 0 < value <= 30, (r["metric"], value)

    # 5. The collapse alert fires for the collapsed stream only, in real Prometheus too.
    def firing():
        alerts = _get_json(f"{base}/api/v1/alerts")["data"]["alerts"]
        return [a for a in alerts if a["state"] == "firing"]

    alerts = _wait(lambda: firing() or None, 60, "CasecloudFilterCollapsed to fire", logs, procs)
    assert [(a["labels"]["alertname"], a["labels"]["stream"], a["labels"]["severity"]) for a in alerts] == [
        ("CasecloudFilterCollapsed", COLLAPSING, "critical")
    ]
    assert alerts[0]["annotations"]["runbook_url"] == "deploy/RUNBOOK.md#casecloudfiltercollapsed"
    assert service_proc.poll() is None and prom_proc.poll() is None
