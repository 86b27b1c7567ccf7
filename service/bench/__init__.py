"""
``casecloud bench``: how fast one daily update is, against in-process baselines.

The command is a list of *sections*; each section prepares a workload, times it
and returns plain figures plus the performance targets it checks: ``update``
(the reference workload, below), ``service`` (end to end through Kafka, see
``service/bench/end_to_end.py``) and ``forecast`` (intervention scenarios with
common random numbers against their binomial floor, see :func:`bench_forecast`),
each registered in :data:`SECTIONS`. The JSON output keeps the reference section's figures at the top level
(``update_seconds``, ``floor_ratio``, ...); further sections go under their own
key, and ``targets`` gathers every section's pass/fail checks.

Times are wall-clock (``time.perf_counter``) and the targets are judged on
them; the thread CPU time of the same runs is reported beside them (``cpu``,
and ``cpu_value`` / ``cpu_pass`` in each target) because on a shared, busy
machine wall-clock medians of a few repeats mostly measure the other
processes. Raise ``--repeats`` there, or run on a quiet machine.

The command exits 0 whether or not targets pass: it reports, it does not gate.
"""

from .command import BENCH_FORMAT, SECTIONS, format_report, run_bench, run_bench_command
from .common import SectionResult, Target
from .forecast import bench_forecast
from .naive import NaiveModel
from .update import UpdateWorkload, bench_update, prepare_update_workload, record_binomial_calls

__all__ = [
    "BENCH_FORMAT",
    "SECTIONS",
    "NaiveModel",
    "SectionResult",
    "Target",
    "UpdateWorkload",
    "bench_forecast",
    "bench_update",
    "format_report",
    "prepare_update_workload",
    "record_binomial_calls",
    "run_bench",
    "run_bench_command",
]
