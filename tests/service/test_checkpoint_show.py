"""``casecloud checkpoint show``: the short summary by default, the full report with ``--json``.

Checkpoints are written here with chosen weights and header, so each line of
the summary is checked against a value known in advance; the effective sample
size against Kish's closed form (sum w)^2 / sum w^2. That the summary reads
the header keys the service really writes is checked on the demo's own
checkpoint in test_demo_next_steps.py.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import orjson

from service.cli import main
from service.state import Checkpoint, LocalCheckpointStore, describe_checkpoint

# 8 particles of weight 1, one of 3, one of 0: Kish's ESS = 11^2 / (8 + 9) = 7.12 of 10
WEIGHTS = np.array([1.0] * 8 + [3.0, 0.0])


def _header(**alerts) -> dict:
    return {
        "model": "seir_two_band",
        "last_day": 47,
        "last_period": "2025-10-18",
        "positions": {"feeds/ed.ndjson|0": 52, "casecloud.observations|3": 9001},
        "alerts": alerts
        or {
            "surge": {"active": True, "alert_id": "id-raised", "above": 2, "last_probability": 0.8125},
            "calm": {"active": False, "alert_id": "id-old", "above": 0, "last_probability": 0.25},
            "rising": {"active": False, "alert_id": None, "above": 1, "last_probability": None},
        },
        "filter": {"model_fingerprint": "fp-1", "config": {"n_particles": 10}, "step": 47, "time": 47},
    }


def _write(root: Path, stream: str = "ward-north", step: int = 47, log_weights=None, **alerts) -> Path:
    with np.errstate(divide="ignore"):
        lw = np.log(WEIGHTS) if log_weights is None else log_weights
    checkpoint = Checkpoint(stream, step, _header(**alerts), {"log_weights": lw, "states": np.zeros((10, 2, 4), dtype=np.int64)})
    return LocalCheckpointStore(root).write(checkpoint).path


def _show(capsys, *args: str) -> tuple[int, str, str]:
    code = main(["checkpoint", "show", *args])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def test_summary_names_each_fact_of_the_newest_checkpoint(tmp_path, capsys):
    _write(tmp_path, step=46)
    path = _write(tmp_path, step=47)
    code, out, _ = _show(capsys, "--checkpoint-dir", str(tmp_path))
    assert code == 0
    lines = out.splitlines()
    assert lines[0] == "stream ward-north"
    field = {line[2:17].strip(): line[17:] for line in lines[1:] if line[2:17].strip()}
    # Bug caught: an older checkpoint summarised (step 46), or the step of the filter shown as the file's.
    assert field["checkpoint"] == f"{path} (intact)"
    assert field["step"] == "47 (records assimilated)"
    assert field["size"] == f"{path.stat().st_size:,} bytes"
    assert field["last period"] == "2025-10-18 (model day 47; model seir_two_band, fingerprint fp-1)"
    # Kish's closed form: 121 / 17 = 7.12 of 10. Bug caught: ESS of the log-weights taken as weights,
    # or of unnormalised weights.
    assert field["particles"] == "10; effective sample size 7 of 10 (71%)"
    # Alert states, sorted by rule: raised (with its id), cleared (with the cleared id), quiet but counting.
    at = lines.index(next(line for line in lines if line.startswith("  alerts")))
    assert [line[17:] for line in lines[at : at + 3]] == [
        "calm: clear (alert id-old cleared at probability 0.25)",
        "rising: clear, 1 consecutive update(s) at or above the raise level",
        "surge: RAISED (alert id-raised, last published probability 0.81)",
    ]
    at = lines.index(next(line for line in lines if line.startswith("  last position")))
    # Bug caught: "topic|partition" keys split at the first "|" or shown raw.
    assert [line[17:] for line in lines[at : at + 2]] == [
        "casecloud.observations partition 3, offset 9001 (the last record applied)",
        "feeds/ed.ndjson partition 0, offset 52 (the last record applied)",
    ]


def test_json_is_the_full_report_unchanged(tmp_path, capsys):
    path = _write(tmp_path)
    code, out, _ = _show(capsys, "--checkpoint-dir", str(tmp_path), "--json")
    assert code == 0
    # Bug caught: --json reformatted or trimmed (scripts parse it): byte for byte the earlier output.
    expected = orjson.dumps(describe_checkpoint(path), option=orjson.OPT_INDENT_2 | orjson.OPT_SERIALIZE_NUMPY, default=str)
    assert out == expected.decode() + "\n"
    assert orjson.loads(out)["header"]["alerts"]["surge"]["alert_id"] == "id-raised"


def test_summary_of_several_streams_and_of_a_damaged_newest_file(tmp_path, capsys):
    _write(tmp_path, stream="ward-south", step=3)
    path = _write(tmp_path, stream="ward-north", step=5)
    data = bytearray(path.read_bytes())
    data[-40] ^= 0x10  # inside the arrays: the header still reads, the checksum does not match
    path.write_bytes(bytes(data))
    code, out, _ = _show(capsys, "--checkpoint-dir", str(tmp_path))
    assert code == 0  # as before: show reports, verify judges
    north, south = out.split("\n\n")
    assert north.startswith("stream ward-north\n") and south.startswith("stream ward-south\n")
    # Bug caught: a damaged file summarised as intact, or its effective sample size read from bad bytes.
    assert f"  checkpoint     {path} (DAMAGED: checksum mismatch" in north
    assert "effective sample size - (the checkpoint cannot be read)" in north
    assert "last period    2025-10-18" in north  # the header is still shown, for forensics
    assert "effective sample size 7 of 10 (71%)" in south


def test_summary_of_a_collapsed_cloud(tmp_path, capsys):
    _write(tmp_path, log_weights=np.full(10, -np.inf))
    code, out, _ = _show(capsys, "--checkpoint-dir", str(tmp_path), "--stream", "ward-north")
    assert code == 0
    # Bug caught: a division by zero (nan or a crash) when no particle has weight.
    assert "  particles      10; effective sample size 0 of 10 (no particle has positive weight)" in out.splitlines()


def test_unknown_stream_is_named_with_the_place_looked_in(tmp_path, capsys):
    _write(tmp_path)
    code, out, err = _show(capsys, "--checkpoint-dir", str(tmp_path), "--stream", "ward-east")
    assert code == 1 and out == ""
    assert err.strip() == f"casecloud: stream 'ward-east' has no checkpoint under {tmp_path}"


def test_a_cloud_that_has_assimilated_nothing_says_so(tmp_path, capsys):
    # A new stream whose first record was refused is checkpointed at its prior (step 0, no period):
    # the summary says so instead of printing "None (model day None; ...".
    header = _header() | {"last_day": None, "last_period": None, "positions": {}}
    checkpoint = Checkpoint("ward-new", 0, header, {"log_weights": np.zeros(10), "states": np.zeros((10, 2, 4), dtype=np.int64)})
    LocalCheckpointStore(tmp_path).write(checkpoint)
    code, out, _ = _show(capsys, "--checkpoint-dir", str(tmp_path))
    assert code == 0
    assert "  last period    none yet: the cloud is still its prior (model seir_two_band, fingerprint fp-1)" in out.splitlines()
    assert "None" not in out
