"""History CSV columns for positivity and concentration series (schemas.load_history, History.check_kinds).

Conventions (schemas/_history.py's docstring): a positivity series' column holds positives and
``<series>.tests`` its tests; a concentration series' column holds a decimal >= 0 or ``nd`` (not
detected), with optional ``<series>.lod`` and ``<series>.flow``. The rules are the observation
message's (schemas.ObservationMessage, schemas.Concentration): each bad cell is refused with the
file, line, column, the text given and what is allowed.
"""

from __future__ import annotations

import datetime as dt
import math
from pathlib import Path

import numpy as np
import pytest

from filters import (
    CompartmentalModel,
    FilterConfig,
    Observation,
    ParticleFilter,
    history_observations,
)
from schemas import SpecError, load_history, load_model_spec
from service.cli import main

SPEC = Path(__file__).parent / "filters" / "specs" / "sir_all_kinds.toml"
START = dt.date(2026, 1, 31)
GOOD = (
    "period,cases,lab_pos,lab_pos.tests,ww,ww.lod,ww.flow\n"
    "2026-02-01,31,12,240,1830.5,50,\n"
    "2026-02-02,28,9,198,nd,50,\n"
    "2026-02-03,35,,,2.21e3,,1.5e7\n"
    "2026-02-04,,0,17,0,40,\n"
)


def write(tmp_path, text: str, name: str = "history.csv"):
    path = tmp_path / name
    path.write_text(text)
    return path


def kinds():
    spec = load_model_spec(SPEC)
    return {s.name: s.kind for s in spec.series}


def test_all_kinds_are_read_and_become_observations_the_filter_takes(tmp_path):
    h = load_history(write(tmp_path, GOOD))
    assert h.series == ["cases", "lab_pos", "ww"]
    assert h.extras == {"lab_pos": ("tests",), "ww": ("lod", "flow")}
    assert h.values[0] == {"cases": 31, "lab_pos": 12, "ww": 1830.5}
    assert isinstance(h.values[0]["cases"], int) and isinstance(h.values[0]["lab_pos"], int)  # counts stay whole
    assert h.values[1]["ww"] == 0.0 and h.limits[1]["ww"] == 50.0  # nd: below its limit
    assert h.tests[2] == {"lab_pos": None} and h.flows[2] == {"ww": 1.5e7}
    assert h.values[3] == {"cases": None, "lab_pos": 0, "ww": 0.0} and h.limits[3]["ww"] == 40.0
    h.check_kinds(kinds(), "model 'sir_all_kinds'")
    obs = history_observations(h, START)
    assert obs[0] == Observation(1, {"cases": 31.0, "lab_pos": 12.0, "ww": 1830.5}, {"lab_pos": 240.0}, {"ww": 50.0}, {})
    assert obs[1] == Observation(2, {"cases": 28.0, "lab_pos": 9.0, "ww": 0.0}, {"lab_pos": 198.0}, {"ww": 50.0}, {})
    assert obs[2].values["lab_pos"] is None and obs[2].trials == {} and obs[2].flows == {"ww": 1.5e7}
    # The filter takes them (a sample flow needs a reference_flow: drop it for this spec, which has none).
    model = CompartmentalModel(load_model_spec(SPEC))
    pf = ParticleFilter(model, FilterConfig(n_particles=200), np.random.default_rng(3))
    for o in obs:
        o = Observation(o.time, o.values, o.trials, o.limits, {})
        result = pf.step(o, with_summary=False)
        assert result.log_evidence_increment is not None and math.isfinite(result.log_evidence_increment)


@pytest.mark.parametrize(
    "text, where, allowed",
    [
        # positivity
        ("period,p,p.tests\n2026-02-01,12,10\n", ":2: column 2 (p): positives 12 above the 10 tests in column 3", "positives from 0 to the number of tests"),
        ("period,p,p.tests\n2026-02-01,3,10.5\n", ":2: column 3 (p.tests): tests '10.5'", "a whole number of tests from 1 to"),
        ("period,p,p.tests\n2026-02-01,3,-10\n", ":2: column 3 (p.tests): tests '-10'", "a whole number of tests from 1 to"),
        ("period,p,p.tests\n2026-02-01,0,0\n", ":2: column 3 (p.tests): tests '0'", "the share positive of no tests is undefined"),
        ("period,p,p.tests\n2026-02-01,3,\n", ":2: column 3 (p.tests): tests empty beside 3 positives", "from 1 to"),
        ("period,p,p.tests\n2026-02-01,,10\n", ":2: column 3 (p.tests): tests '10' given, but 'p' (column 2) is empty", "tests only on rows that give the positives"),
        ("period,p,p.tests\n2026-02-01,2.5,10\n", ":2: column 2 (p): positives '2.5'", "a whole number from 0 to"),
        ("period,cases,q.tests\n2026-02-01,3,10\n", ":1: column 3 header 'q.tests' has no column 'q' beside it", "only with a column 'q'"),
        ("period,p,p.tests,p.lod\n2026-02-01,3,10,1\n", ":1: series 'p' has both 'p.tests'", "not both"),
        ("period,p,p.total\n2026-02-01,3,10\n", ":1: column 3 header 'p.total' is not a series name", "'<series>.tests'"),
        # concentration
        ("period,ww,ww.lod\n2026-02-01,-3.5,10\n", ":2: column 2 (ww): concentration '-3.5'", "a finite decimal >= 0"),
        ("period,ww\n2026-02-01,-3.5\n", ":2: column 2 (ww): count '-3.5'", "for a concentration series a finite decimal >= 0"),
        ("period,ww,ww.lod\n2026-02-01,inf,10\n", ":2: column 2 (ww): concentration 'inf'", "a finite decimal >= 0"),
        ("period,ww,ww.lod\n2026-02-01,nan,10\n", ":2: column 2 (ww): concentration 'nan'", "a finite decimal >= 0"),
        ("period,ww,ww.lod\n2026-02-01,1e999,10\n", ":2: column 2 (ww): concentration '1e999'", "a finite decimal >= 0"),
        ("period,ww\n2026-02-01,nd\n", ":2: column 2 (ww): count 'nd' (not detected) without a limit of detection", "a column 'ww.lod'"),
        ("period,ww,ww.lod\n2026-02-01,nd,\n", ":2: column 2 (ww): concentration 'nd' (not detected) without a limit", "column 3 (ww.lod) on this row"),
        ("period,ww,ww.lod\n2026-02-01,0,\n", ":2: column 2 (ww): concentration '0' (not detected) without a limit", "only 'below the limit' is known"),
        ("period,ww\n2026-02-01,0.0\n", ":2: column 2 (ww): count '0.0' (not detected) without a limit", "a column 'ww.lod'"),
        ("period,ww,ww.lod\n2026-02-01,40,0\n", ":2: column 3 (ww.lod): limit of detection '0'", "a finite decimal > 0"),
        ("period,ww,ww.lod\n2026-02-01,40,-2\n", ":2: column 3 (ww.lod): limit of detection '-2'", "a finite decimal > 0"),
        ("period,ww,ww.flow\n2026-02-01,40,0\n", ":2: column 3 (ww.flow): flow '0'", "a finite decimal > 0"),
        ("period,ww,ww.lod\n2026-02-01,,20\n", ":2: column 3 (ww.lod): lod '20' given, but 'ww' (column 2) is empty", "only on rows that give a value"),
        ("period,ww.lod,ww\n2026-02-01,20,abc\n", ":2: column 3 (ww): concentration 'abc'", "'nd' for not detected"),
        # vintage form: the same rules
        ("period,as_of,p,p.tests\n2026-02-01,2026-02-01,12,10\n", ":2: column 3 (p): positives 12 above the 10 tests in column 4", "positives from 0"),
        ("period,as_of,ww,ww.lod\n2026-02-01,,nd,\n", ":2: column 3 (ww): concentration 'nd'", "with the lab's limit"),
    ],
)
def test_each_bad_cell_names_file_line_column_given_and_allowed(tmp_path, text, where, allowed):
    path = write(tmp_path, text)
    with pytest.raises(SpecError) as info:
        load_history(path)
    message = str(info.value)
    assert message.startswith(str(path)), message
    assert where in message, message
    assert allowed in message, message


@pytest.mark.parametrize(
    "text, says",
    [
        # a decimal (or nd, or a level above 10^9) in a count column: read as a concentration, refused against the model
        ("period,cases\n2026-02-01,3\n2026-02-02,2.5\n", "line 3, column 2: '2.5' in column 'cases': series 'cases' of model 'sir_all_kinds' has kind 'incidence', a count"),
        ("period,cases\n2026-02-01,3\n2026-02-02,2000000000\n", "line 3, column 2: '2000000000' in column 'cases'"),
        ("period,cases,cases.lod\n2026-02-01,nd,4\n", "column 'cases.lod': series 'cases' of model 'sir_all_kinds' has kind 'incidence'"),
        ("period,cases,cases.tests\n2026-02-01,3,10\n", "column 'cases.tests': series 'cases' of model 'sir_all_kinds' has kind 'incidence'"),
        ("period,lab_pos\n2026-02-01,3\n", "column 'lab_pos' is positivity series 'lab_pos' of model 'sir_all_kinds'"),
        ("period,ww,ww.tests\n2026-02-01,3,10\n", "column 'ww.tests': series 'ww' of model 'sir_all_kinds' has kind 'concentration'"),
    ],
)
def test_a_column_whose_shape_is_not_its_series_kind_is_refused_where_history_meets_the_model(tmp_path, text, says):
    path = write(tmp_path, text)
    h = load_history(path)  # the history alone cannot tell (it knows nothing of the spec)
    with pytest.raises(SpecError) as info:
        h.check_kinds(kinds(), "model 'sir_all_kinds'")
    message = str(info.value)
    assert message.startswith(str(path)) and says in message, message
    assert "allowed:" in message


def test_a_whole_number_concentration_column_is_fine_for_a_concentration_series(tmp_path):
    """A site whose values happen to be whole numbers and carry no .lod column is still a valid concentration column."""
    h = load_history(write(tmp_path, "period,ww\n2026-02-01,1200\n2026-02-02,900\n"))
    h.check_kinds(kinds())
    assert history_observations(h, START)[0] == Observation(1, {"ww": 1200.0})


def test_vintages_carry_tests_limits_and_flows_with_their_eventual_values(tmp_path):
    text = (
        "period,as_of,cases,lab_pos,lab_pos.tests,ww,ww.lod\n"
        "2026-02-01,2026-02-01,31,12,240,nd,50\n"
        "2026-02-02,2026-02-02,28,,,310.5,\n"
        "2026-02-02,2026-02-03,,9,198,,\n"
    )
    h = load_history(write(tmp_path, text))
    h.check_kinds(kinds())
    assert [v.tests for v in h.vintages] == [{"lab_pos": 240}, {"lab_pos": None}, {"lab_pos": 198}]
    assert h.vintages[0].limits == {"ww": 50.0} and h.vintages[0].counts["ww"] == 0.0
    assert h.values[1] == {"cases": 28, "lab_pos": 9, "ww": 310.5}
    assert h.tests[1] == {"lab_pos": 198} and h.limits[1] == {"ww": None}
    obs = history_observations(h, START)
    assert obs[0].trials == {"lab_pos": 240.0} and obs[0].limits == {"ww": 50.0} and obs[0].values["ww"] == 0.0
    assert obs[1].trials == {"lab_pos": 198.0}


def test_calibrate_refuses_a_history_column_of_the_wrong_kind(tmp_path, capsys):
    path = write(tmp_path, "period,cases,ww\n2026-02-01,3,2.5\n2026-02-02,4.5,3.5\n")
    code = main(["calibrate", "--model", str(SPEC), "--history", str(path), "--start", "2026-01-31",
                 "--out", str(tmp_path / "fit"), "--iterations", "4", "--particles", "20"])  # fmt: skip
    err = capsys.readouterr().err
    assert code == 2
    assert "line 3, column 2: '4.5' in column 'cases': series 'cases' of model 'sir_all_kinds' has kind 'incidence'" in err
    assert not (tmp_path / "fit").exists()  # nothing started


def test_calibrate_reads_positivity_and_concentration_columns(tmp_path):
    """The likelihood calibrate fits uses the tests, limits and values of the new columns: the same
    positives out of other tests, or a sample read as not detected, change the estimate (same seed,
    so the same particles). Bug caught: the extra columns dropped on the way to the observations."""
    from filters import calibration_parameters, log_likelihood_estimate

    model = CompartmentalModel(load_model_spec(SPEC))
    params = calibration_parameters(model)

    def loglik(text: str) -> float:
        obs = history_observations(load_history(write(tmp_path, text)), START)
        return log_likelihood_estimate(model, obs, params, np.array([0.45]), 300, np.random.default_rng(4))

    base = "period,cases,lab_pos,lab_pos.tests,ww,ww.lod\n2026-02-01,3,5,100,40.0,20\n2026-02-02,4,6,100,55.0,20\n"
    more_tests = base.replace(",5,100,", ",5,400,")
    not_detected = base.replace("55.0,20", "nd,20")
    values = [loglik(t) for t in (base, more_tests, not_detected)]
    assert all(math.isfinite(v) for v in values) and len(set(values)) == 3, values
    code = main(["calibrate", "--model", str(SPEC), "--history", str(write(tmp_path, base)), "--start", "2026-01-31",
                 "--out", str(tmp_path / "fit"), "--iterations", "6", "--particles", "50", "--chains", "2",
                 "--noise-repeats", "0", "--quiet"])  # fmt: skip
    assert code == 0
