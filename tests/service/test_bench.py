"""``casecloud bench`` on a tiny workload: the report's shape, and that its naive
baseline is the same model as the vectorised engine.

No wall-clock bound is asserted anywhere: performance targets are measured by
the benchmark itself (DESIGN.md, Conventions).
"""

from __future__ import annotations

import math

import numpy as np
import orjson
import pytest

from filters import Observation
from service.bench import (
    NaiveModel,
    format_report,
    prepare_update_workload,
    record_binomial_calls,
    run_bench,
)
from service.cli import main

TINY = {"update": {"naive_particles": 20, "warmup_days": 5}}


@pytest.fixture(scope="module")
def report() -> dict:
    return run_bench(particles=200, repeats=1, options=TINY)


def _numbers(value):
    """Every number inside a JSON-like value."""
    if isinstance(value, bool):
        return
    if isinstance(value, (int, float)):
        yield value
    elif isinstance(value, dict):
        for v in value.values():
            yield from _numbers(v)
    elif isinstance(value, list):
        for v in value:
            yield from _numbers(v)


def test_report_has_the_documented_keys(report):
    for key in (
        "workload",
        "update_seconds",
        "update_with_summary_seconds",
        "floor_seconds",
        "floor_ratio",
        "floor_ratio_with_summary",
        "naive_seconds",
        "naive_speedup",
        "peak_bytes_per_particle",
        "state_bytes_per_particle",
        "targets",
    ):
        assert key in report, key
    w = report["workload"]
    assert w["spec"] == "seir_two_band" and w["particles"] == 200 and w["repeats"] == 1
    assert w["groups"] == 2 and w["substeps_per_day"] == 4 and w["delay_kernel_weights"] == 7
    assert report["sections"] == ["update"]


def test_figures_are_positive_and_finite(report):
    for key in (
        "update_seconds",
        "update_with_summary_seconds",
        "floor_seconds",
        "floor_ratio",
        "floor_ratio_with_summary",
        "naive_seconds",
        "naive_speedup",
        "peak_bytes_per_particle",
        "state_bytes_per_particle",
    ):
        value = report[key]
        assert isinstance(value, float) and math.isfinite(value) and value > 0, (key, value)
    assert all(math.isfinite(x) for x in _numbers(report) if isinstance(x, float))
    assert report["floor_ratio"] == pytest.approx(report["update_seconds"] / report["floor_seconds"])
    assert report["naive_speedup"] == pytest.approx(report["naive_seconds"] / report["update_seconds"])
    # Particle state of this spec: 2x4 int64 counts + 6 float64 parameters
    # + (7 kernel days + 6 window days) x 1 flow x 2 groups int64 incidence history + one float64
    # log-weight per particle (the assimilation window defaults to the longest delay, 6 days).
    assert report["state_bytes_per_particle"] == 8 * (8 + 6 + 13 * 2 + 1)


def test_targets_are_pass_fail_booleans(report):
    targets = report["targets"]
    assert set(targets) >= {"floor_ratio", "floor_ratio_with_summary", "naive_speedup"}
    for name, t in targets.items():
        assert isinstance(t["pass"], bool)
        bound = t.get("max", t.get("min"))
        assert bound is not None
        assert t["pass"] == (t["value"] <= t["max"] if "max" in t else t["value"] >= t["min"]), name
    assert targets["floor_ratio"]["max"] == 1.3 and targets["naive_speedup"]["min"] == 20.0


def test_report_is_json_and_readable(report):
    again = orjson.loads(orjson.dumps(report))
    assert again["targets"].keys() == report["targets"].keys()
    text = format_report(report)
    assert "floor ratio" in text and "naive speed-up" in text
    assert ("PASS" in text) or ("FAIL" in text)


def test_cli_prints_one_json_object(capsys):
    assert main(["bench", "--json", "--particles", "100", "--repeats", "1"]) == 0
    out = capsys.readouterr().out
    data = orjson.loads(out)
    assert data["workload"]["particles"] == 100
    assert isinstance(data["targets"]["floor_ratio"]["pass"], bool)


def test_cli_refuses_nonsense_sizes(capsys):
    assert main(["bench", "--particles", "0"]) == 2
    assert "--particles" in capsys.readouterr().err


def test_floor_replays_the_schemes_binomial_draws():
    """One day of the two-band SEIR: 4 sub-steps x one leave-draw for each of S, E, I."""
    work = prepare_update_workload(150, warmup_days=3)
    calls = record_binomial_calls(work)
    assert len(calls) == 4 * 3
    for n, p in calls:
        assert n.shape == p.shape == (150, 2)
        assert n.dtype == np.int64 and (n >= 0).all()
        assert ((p >= 0) & (p <= 1)).all()


# ------------------------------------------------- the naive loop is the same model
@pytest.fixture(scope="module")
def cloud():
    """One particle of a warmed-up cloud, repeated: identical starting states."""
    work = prepare_update_workload(300, warmup_days=20, seed=7)
    pf = work.filter()
    pick = int(np.argmax(pf.particles.states[:, :, 2].sum(axis=1)))  # most infectious: big counts
    return work, pf, pick


def _replicated(pf, pick: int, m: int) -> dict[str, np.ndarray]:
    arrays = pf.particles.arrays()
    return {k: np.repeat(v[pick : pick + 1], m, axis=0) for k, v in arrays.items()}


def test_naive_likelihood_equals_the_engines(cloud):
    work, pf, _ = cloud
    model = work.model
    ps = pf.particles
    loglik = model.log_likelihood(ps, work.observation)
    naive = NaiveModel(model)
    values = work.observation.present()
    expected = [
        naive.log_likelihood_particle(ps.params[i].tolist(), ps.history[i].tolist(), values) for i in range(ps.size)
    ]
    np.testing.assert_allclose(loglik, expected, rtol=1e-10, atol=1e-10)
    # A zero count and a missing series follow the same rules too.
    obs = Observation(time=work.observation.time, values={"ed_child": 0.0, "ed_adult": None})
    expected = [
        naive.log_likelihood_particle(ps.params[i].tolist(), ps.history[i].tolist(), obs.present())
        for i in range(ps.size)
    ]
    np.testing.assert_allclose(model.log_likelihood(ps, obs), expected, rtol=1e-10, atol=1e-10)


@pytest.mark.slow
def test_naive_dynamics_match_the_engine_in_distribution(cloud):
    """From one identical state, a day of the naive loop and of the vectorised
    engine give the same mean and spread of incidence and of every compartment,
    within Monte Carlo error (two-sample z on means, ratio on variances)."""
    work, pf, pick = cloud
    model = work.model
    t0 = int(work.header["time"])
    m_vec, m_naive = 6000, 2000
    vec = pf.particles.take(np.full(m_vec, pick))
    model.advance(vec, t0, t0 + 1, np.random.default_rng(11))
    naive = NaiveModel(model)
    states, history, _ = naive.step(
        _replicated(pf, pick, m_naive), t0, Observation(t0 + 1, {}), np.random.default_rng(12), np.arange(m_naive)
    )
    quantities = {
        "incidence child": (vec.history[:, 0, 0, 0], history[:, 0, 0, 0]),
        "incidence adult": (vec.history[:, 0, 0, 1], history[:, 0, 0, 1]),
    }
    for c, name in enumerate(model.compartments):
        for g, group in enumerate(model.groups):
            quantities[f"{name}[{group}]"] = (vec.states[:, g, c], states[:, g, c])
    # Conservation holds for the naive loop as for the engine.
    assert (states.sum(axis=2) == model.population).all()
    for name, (a, b) in quantities.items():
        a, b = a.astype(float), b.astype(float)
        se = math.sqrt(a.var(ddof=1) / a.size + b.var(ddof=1) / b.size)
        assert abs(a.mean() - b.mean()) <= 5 * se + 1e-9, (name, a.mean(), b.mean(), se)
        if a.var() > 1:
            # Variance ratio: sd of log(s1^2/s2^2) is about sqrt(2/(n1-1) + 2/(n2-1)) for near-normal data.
            assert abs(math.log(a.var(ddof=1) / b.var(ddof=1))) <= 5 * math.sqrt(2 / (a.size - 1) + 2 / (b.size - 1)), name
    # The comparison has power: incidence is in the hundreds and varies.
    inc = quantities["incidence child"][0]
    assert inc.mean() > 50 and inc.var() > 10


def test_feeds_section_times_late_values_and_revisions_against_a_daily_step():
    # Bug caught: a section that times the wrong work (e.g. a "late" value that moves the
    # cloud, which would cost as much as the daily step) or reports no targets.
    report = run_bench(particles=200, repeats=1, sections=("feeds",), options={"feeds": {"warmup_days": 21}})
    figures = report["feeds"]
    assert figures["workload"]["window_days"] == 21 and figures["workload"]["history_days"] == 28
    for key in ("daily_step_seconds", "late_value_seconds", "revision_seconds", "late_ratio", "revision_ratio"):
        assert isinstance(figures[key], float) and math.isfinite(figures[key]) and figures[key] > 0, key
    assert figures["late_ratio"] == pytest.approx(figures["late_value_seconds"] / figures["daily_step_seconds"])
    assert set(report["targets"]) == {"feeds.late_ratio", "feeds.revision_ratio"}
    assert all(t["max"] == 0.2 for t in report["targets"].values())
