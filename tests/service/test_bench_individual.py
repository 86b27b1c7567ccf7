"""``casecloud bench --sections individual`` on a tiny workload: the report's shape,
the memory layout, and that its floor replays every draw the step makes.

No wall-clock bound is asserted (DESIGN.md, Conventions): speed is what the
benchmark reports, not what a test checks.
"""

from __future__ import annotations

import math

import numpy as np

from service.bench import SECTIONS, run_bench
from service.bench.individual import _RecordingDraws, _replay, prepare_individual_workload

TINY = {"individual": {"town_particles": 12, "seed_particles": 4, "warmup_days": 12}}


def test_the_section_is_registered_and_reports_its_figures():
    """Bug caught: the section missing from the registry, or a figure left NaN."""
    assert "individual" in SECTIONS
    report = run_bench(particles=10, repeats=1, sections=("individual",), options=TINY)
    figures = report["individual"]
    assert "error" not in figures, figures
    assert figures["workload"]["particles"] == 12 and figures["workload"]["people"] == 20_000
    for key in ("step_seconds", "step_ns_per_particle_person", "floor_seconds", "floor_ratio", "dense_draw_floor_ratio",
                "peak_bytes_per_particle_person", "state_bytes_per_particle_person"):
        assert math.isfinite(figures[key]) and figures[key] > 0, key
    assert {"individual.floor_ratio", "individual.dense_draw_floor_ratio", "individual.state_bytes_per_particle_person"} <= set(report["targets"])


def test_state_is_one_byte_per_person_plus_a_small_history():
    """The layout the issue asks for: at most 4 bytes per particle-person. Bug caught:
    the state widened (e.g. int64 codes) or a per-person array added to the particles."""
    model, cloud, _ = prepare_individual_workload(6, 3, 5)
    assert cloud.states.dtype == np.uint8 and cloud.states.shape == (6, model.people)
    per_cell = sum(a.nbytes for a in cloud.arrays().values()) / cloud.states.size
    assert per_cell < 1.2


def test_the_floor_replays_exactly_the_draws_of_the_step():
    """Replaying the recorded calls from the same seed leaves the generator where the
    step left it. Bug caught: a draw the recorder does not see (the floor would leave
    out random numbers the step pays for)."""
    model, cloud, day = prepare_individual_workload(8, 4, 15)
    stepped = np.random.Generator(np.random.PCG64(5))
    recorder = _RecordingDraws(stepped)
    model.advance(cloud.take(np.arange(cloud.size)), day, day + 1, recorder)  # type: ignore[arg-type]
    assert recorder.calls
    replayed = np.random.Generator(np.random.PCG64(5))
    _replay(recorder.calls, replayed)
    assert replayed.bit_generator.state == stepped.bit_generator.state
