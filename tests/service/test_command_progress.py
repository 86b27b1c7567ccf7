"""Progress of the long commands (backtest, replay, bench): on stderr only, outputs unchanged.

Each command runs twice on the same inputs, once with the plain-line interval
so long that nothing is shown and once at interval 0 (a line at every update,
``service.console.PROGRESS_INTERVAL``); stdout and every file written must be
byte-identical between the two. Calibrate's progress is checked in
test_calibrate_cli.py, the display itself in test_progress.py.
"""

from __future__ import annotations

import datetime as dt
import io
import re
from pathlib import Path

import numpy as np
import orjson

from filters import CompartmentalModel, simulate_season
from schemas import example_model_path, load_model_spec
from service.bench import run_bench
from service.cli import main
from service.console import Progress

START = dt.date(2026, 1, 1)
STREAM = "west-cases"
CONFIG = f"""
transport = "file"

[service]
seed = 3
checkpoint_dir = "ck"

[metrics]
enabled = false

[[streams]]
id = "{STREAM}"
model = "sir"
start = "{START.isoformat()}"
particles = 100
forecast_trajectories = 50
"""


def _season(days: int) -> list[tuple[str, int]]:
    model = CompartmentalModel(load_model_spec(example_model_path("sir")))
    truth = simulate_season(model, days, np.random.default_rng(4), params={"beta": 0.5})
    return [((START + dt.timedelta(days=o.time)).isoformat(), int(o.values["cases"])) for o in truth.observations]


def _run(capsys, monkeypatch, interval: float, argv: list[str]) -> tuple[int, str, str]:
    monkeypatch.setattr("service.console.PROGRESS_INTERVAL", interval)
    code = main(argv)
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _files(directory: Path) -> dict[str, bytes]:
    return {str(p.relative_to(directory)): p.read_bytes() for p in sorted(directory.rglob("*")) if p.is_file()}


def test_backtest_progress_counts_history_rows_on_stderr_only(tmp_path, capsys, monkeypatch):
    (tmp_path / "deploy.toml").write_text(CONFIG, encoding="utf-8")
    rows = _season(20)
    (tmp_path / "history.csv").write_text("period,cases\n" + "".join(f"{p},{c}\n" for p, c in rows), encoding="utf-8")
    args = ["backtest", "--config", str(tmp_path / "deploy.toml"), "--history", str(tmp_path / "history.csv"),
            "--stream", STREAM, "--horizons", "1,3"]  # fmt: skip
    quiet = _run(capsys, monkeypatch, 1e9, [*args, "--out", str(tmp_path / "quiet")])
    shown = _run(capsys, monkeypatch, 0.0, [*args, "--out", str(tmp_path / "shown")])
    assert quiet[0] == shown[0] == 0
    # Bug caught: progress written to stdout (into the table a script reads) or changing the results.
    assert shown[1] == quiet[1] and _files(tmp_path / "shown") == _files(tmp_path / "quiet")
    assert "history rows" not in quiet[2]  # a run shorter than the interval shows nothing
    counts = re.findall(r"^backtest: (\d+)/20 history rows", shown[2], flags=re.M)
    assert [int(c) for c in counts] == [*range(1, 21), 20]  # every row, then the closing line
    assert re.search(r"^backtest: 20/20 history rows \(100%\), done in \d+ s$", shown[2], flags=re.M)


def test_replay_progress_counts_lines_and_a_resumed_replay_starts_where_it_stopped(tmp_path, capsys, monkeypatch):
    (tmp_path / "deploy.toml").write_text(CONFIG, encoding="utf-8")
    lines = [orjson.dumps({"stream": STREAM, "period": p, "counts": {"cases": c}}) for p, c in _season(15)]
    for name in ("a", "b"):
        (tmp_path / name).mkdir()
        (tmp_path / name / "feed.ndjson").write_bytes(b"\n".join(lines[:10]) + b"\n")

    def replay(name: str, interval: float):
        # Relative paths from each run's own directory: outputs name the input file as given.
        monkeypatch.chdir(tmp_path / name)
        return _run(capsys, monkeypatch, interval, [
            "replay", "--config", str(tmp_path / "deploy.toml"), "--input", "feed.ndjson", "--out", "out",
            "--checkpoint-dir", "ck",
        ])  # fmt: skip

    quiet, shown = replay("a", 1e9), replay("b", 0.0)
    assert quiet[0] == shown[0] == 0 and quiet[1] == shown[1] == ""
    # Bug caught: progress mixed into the outputs.
    assert _files(tmp_path / "a" / "out") == _files(tmp_path / "b" / "out")
    assert re.findall(r"^replay: (\d+)/10 lines", shown[2], flags=re.M) == [str(n) for n in [*range(1, 11), 10]]
    # The service's record counts stay the last stderr line (scripts read it).
    assert orjson.loads(shown[2].strip().splitlines()[-1]) == {"applied": 10, "skipped": 0, "dead_letter": 0}

    # Five more days arrive; the replay resumes after line 10 and says so from its first update.
    with open(tmp_path / "b" / "feed.ndjson", "ab") as f:
        f.write(b"\n".join(lines[10:]) + b"\n")
    resumed = replay("b", 0.0)
    assert resumed[0] == 0
    # Bug caught: counting from 0 (11 records shown as 1/15) or an estimate spoiled by the skipped lines.
    assert re.findall(r"^replay: (\d+)/15 lines", resumed[2], flags=re.M) == ["11", "12", "13", "14", "15", "15"]


def test_bench_progress_counts_sections_and_carries_their_messages():
    out = io.StringIO()
    shown = Progress("bench", 1, "sections", stream=out, tty=False, interval=0.0)
    report = run_bench(particles=100, repeats=1, sections=("update",),
                       options={"update": {"naive_particles": 10, "warmup_days": 2}}, shown=shown)  # fmt: skip
    shown.finish()
    lines = out.getvalue().splitlines()
    assert "update_seconds" in report
    # Bug caught: the section count never advancing (no estimate ever), or the section's own
    # messages lost now that they no longer print one line each.
    assert lines[0].startswith("bench: 0/1 sections (0%), time left not yet known") and lines[0].endswith("; update")
    assert any(re.match(r"bench: 0/1 sections .*; update: \S", line) for line in lines)
    assert re.match(r"bench: 1/1 sections \(100%\), done in \d+ s$", lines[-1])
