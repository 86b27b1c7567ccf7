"""The allocator settings every command applies (service/allocator.py).

Each case runs in a fresh interpreter: the settings are process-wide and the
pattern measured depends on what the process allocated before. The pattern is
the shape of a model step's temporaries (arrays of 3-20 MiB allocated and freed
in a different order each time), repeated; glibc's default thresholds return
pages to the kernel between rounds, so every round faults them in again
(measured here: about 2,300 page faults a round). The counts come from
``getrusage`` minor faults (Linux).
"""

from __future__ import annotations

import json
import os
import platform
import subprocess
import sys

import pytest

pytestmark = pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="the settings apply to glibc only")

PATTERN = """
import json, resource, sys
import numpy as np
setup = sys.argv[1]
if setup == "main":
    from service.cli import main
    assert main(["schemas", "--out", sys.argv[2]]) == 0
elif setup == "tune":
    from service.allocator import tune_allocator
    print(tune_allocator(), file=sys.stderr)
def faults():
    return resource.getrusage(resource.RUSAGE_SELF).ru_minflt
rounds = []
for _ in range(6):
    f0 = faults()
    a = np.ones(20 << 17); b = np.ones(6 << 17); c = np.ones(3 << 17)
    del a
    d = np.ones(8 << 17); e = np.ones(12 << 17)
    del b, c, d, e
    rounds.append(faults() - f0)
print(json.dumps(rounds))
"""


def _rounds(setup: str, tmp_path, **env: str) -> list[int]:
    clean = {k: v for k, v in os.environ.items() if not k.startswith("MALLOC_") and k != "GLIBC_TUNABLES"}
    out = subprocess.run(
        [sys.executable, "-c", PATTERN, setup, str(tmp_path)],
        env={**clean, **env}, capture_output=True, text=True, check=True, timeout=120,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_every_command_keeps_freed_pages_for_the_next_step(tmp_path):
    """Bug caught: the settings not applied by ``casecloud``'s entry point, or the wrong
    ``mallopt`` parameter numbers (-1 trim, -3 mmap threshold in glibc's malloc.h;
    -2 and -4 are top pad and mmap max, which leave the faults as they are)."""
    plain = _rounds("none", tmp_path / "plain")
    tuned = _rounds("main", tmp_path / "main")
    # After the first round the pattern's pages are reused: no fault at all. Without the
    # settings every later round faults in megabytes (over 1,000 pages of 4 KiB).
    assert sum(tuned[1:]) == 0, tuned
    assert min(plain[1:]) > 1000, plain


def test_settings_given_in_the_environment_win(tmp_path):
    """An operator's MALLOC_* variables are kept: nothing is changed and the default
    behaviour they asked for stays (here: a low trim threshold, so the faults remain)."""
    out = subprocess.run(
        [sys.executable, "-c", "from service.allocator import tune_allocator; print(tune_allocator())"],
        env={**os.environ, "MALLOC_TRIM_THRESHOLD_": "131072"}, capture_output=True, text=True, check=True,
    )
    assert out.stdout.strip() == "environment"
    assert min(_rounds("tune", tmp_path, MALLOC_TRIM_THRESHOLD_="131072")[1:]) > 1000
