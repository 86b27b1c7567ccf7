"""``-m "not integration"`` is documented as "no broker": nothing under
tests/integration may be selected by it (each of those modules starts a Kafka
broker, Prometheus or Chromium). Checked by pytest's own collection, so a new
module that forgets ``pytestmark = pytest.mark.integration`` fails here."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def _collected(*args: str) -> list[str]:
    out = subprocess.run(
        [sys.executable, "-m", "pytest", "--collect-only", "-q", "-p", "no:cacheprovider", *args, "tests/integration"],
        cwd=REPO, capture_output=True, text=True, timeout=300,
    )
    assert out.returncode in (0, 5), out.stdout + out.stderr  # 5: nothing collected
    return [line for line in out.stdout.splitlines() if "::" in line]


def test_not_integration_selects_nothing_under_tests_integration():
    everything = _collected()
    # Positive control: the folder does hold tests, including the broker smoke tests.
    assert any(item.startswith("tests/integration/test_broker_smoke.py::") for item in everything), everything
    assert _collected("-m", "not integration") == []
