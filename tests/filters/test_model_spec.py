"""Model specs: the shipped examples load and compile; bad specs are refused
with errors that say where (file, line, field), what was given and what is
allowed; the rate-expression compiler never executes user text.

Bad specs are written by editing a copy of a shipped example in ``tmp_path``;
expected line numbers are found in the edited text by the test itself.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest

import schemas
from filters import CompartmentalModel, ExpressionError, ModelError, Observation, compile_expression
from schemas import SpecError

MODELS_DIR = Path(schemas.__file__).with_name("models")


def _example_text(name: str) -> str:
    return schemas.example_model_path(name).read_text(encoding="utf-8")


def _edit(text: str, old: str, new: str) -> str:
    assert text.count(old) == 1, f"fixture edit is ambiguous or stale: {old!r}"
    return text.replace(old, new)


def _write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / f"{name}.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _line_of(text: str, pattern: str) -> int:
    """1-based number of the only line matching ``pattern`` (regex)."""
    hits = [i + 1 for i, line in enumerate(text.splitlines()) if re.search(pattern, line)]
    assert len(hits) == 1, f"pattern {pattern!r} matches lines {hits}"
    return hits[0]


def _load_error(path: Path) -> SpecError:
    with pytest.raises(SpecError) as info:
        schemas.load_model_spec(path)
    exc = info.value
    assert str(path) in str(exc), "the message must name the file"
    return exc


# --------------------------------------------------------------- examples
def test_every_shipped_spec_is_listed():
    on_disk = sorted(p.stem for p in MODELS_DIR.glob("*.toml"))
    assert on_disk == sorted(schemas.EXAMPLE_MODELS)


@pytest.mark.parametrize("name", sorted(schemas.EXAMPLE_MODELS))
def test_example_spec_loads_compiles_and_runs(name):
    spec = schemas.load_model_spec(schemas.example_model_path(name))
    model = CompartmentalModel(spec)
    rng = np.random.Generator(np.random.PCG64(1))
    ps = model.initial(64, rng)
    totals = ps.states.sum(axis=2)
    assert np.array_equal(totals, np.broadcast_to(model.population, totals.shape))
    model.advance(ps, 0, 8, rng)
    # Population is conserved exactly and counts stay non-negative.
    assert np.array_equal(ps.states.sum(axis=2), np.broadcast_to(model.population, totals.shape))
    assert (ps.states >= 0).all()
    drawn = model.sample_observation(ps, rng)
    assert set(drawn) == {s.name for s in spec.series}
    values = {k: float(v[0]) for k, v in drawn.items()}
    # A positivity series draws its share positive; its observation is positives out of tests.
    positivity = [s.name for s in spec.series if s.kind == "positivity"]
    values.update({k: float(model.sample_positives(ps, k, 200, rng)[0]) for k in positivity})
    obs = Observation(time=8, values=values, trials={k: 200.0 for k in positivity})
    loglik = model.log_likelihood(ps, obs)
    assert loglik.shape == (64,) and not np.isnan(loglik).any() and np.isfinite(loglik).any()
    assert model.fingerprint() == spec.fingerprint()
    assert len(model.fingerprint()) == 16


# ----------------------------------------------------------- bad specs
def test_unknown_compartment_in_flow(tmp_path):
    text = _edit(_example_text("sir"), 'to = "I"\nrate = "beta * foi"', 'to = "Q"\nrate = "beta * foi"')
    exc = _load_error(_write(tmp_path, "unknown_comp", text))
    msg = str(exc)
    # File and line of the offending key, field path, flow name, given value, allowed values.
    line = text.splitlines().index('to = "Q"') + 1
    assert f"unknown_comp.toml:{line}: field flows[0].to" in msg
    assert "flow 'infection'" in msg
    assert "'Q'" in msg
    assert "allowed: ['S', 'I', 'R']" in msg
    assert len(exc.problems) == 1


def test_unknown_parameter_in_rate_is_a_model_error(tmp_path):
    text = _edit(_example_text("sir"), 'rate = "gamma"', 'rate = "gamma * delta"')
    spec = schemas.load_model_spec(_write(tmp_path, "unknown_param", text))  # syntax is fine
    with pytest.raises(ModelError) as info:
        CompartmentalModel(spec)
    msg = str(info.value)
    assert "model 'sir'" in msg
    assert "flows[1] (recovery).rate" in msg  # field path
    assert "'delta'" in msg and "'gamma * delta'" in msg  # what was given
    assert "allowed names:" in msg and "'gamma'" in msg and "'beta'" in msg  # what is allowed


def test_rate_with_code_is_refused_and_never_run(tmp_path):
    sentinel = tmp_path / "SENTINEL"
    rate = f"__import__('os').system('touch {sentinel}')"
    text = _edit(_example_text("sir"), 'rate = "gamma"', f'rate = "{rate}"')
    spec = schemas.load_model_spec(_write(tmp_path, "code", text))
    with pytest.raises(ModelError) as info:
        CompartmentalModel(spec)
    msg = str(info.value)
    assert "flows[1] (recovery).rate" in msg and "__import__('os').system" in msg
    assert "is not allowed; allowed functions:" in msg
    assert not sentinel.exists()


def _bad_expressions(sentinel: Path) -> list[tuple[str, str]]:
    s = repr(str(sentinel))
    return [
        ("import", f"__import__('os').system('touch ' + {s})"),
        ("attribute", "x.y"),
        ("attribute_call", f"__import__('pathlib').Path({s}).touch()"),
        ("lambda", f"(lambda: open({s}, 'w'))()"),
        ("lambda_bare", "lambda: x"),
        ("subscript", f"[open({s}, 'w')][0]"),
        ("subscript_name", "x[0]"),
        ("comparison", f"open({s}, 'w') == 1"),
        ("comparison_name", "x < 1"),
        ("keywords", "max(x, b=1)"),
        ("keywords_code", f"max(x, b=open({s}, 'w'))"),
        ("builtin_open", f"open({s}, 'w')"),
        ("builtin_name", "open"),
        ("eval", f"eval(\"open({s}, 'w')\")"),
        ("exec", f"exec(\"open({s}, 'w')\")"),
        ("getattr", "getattr(x, 'y')"),
        ("string", "'text'"),
        ("boolean", "True"),
        ("conditional", "1 if x else 2"),
        ("walrus", "(z := x)"),
        ("comprehension", f"[open({s}, 'w') for _ in (1,)]"),
        ("floor_div", "x // 2"),
        ("modulo", "x % 2"),
        ("not", "not x"),
        ("invert", "~x"),
        ("call_name", "x(1)"),
        ("dunder", "x.__class__"),
    ]


@pytest.mark.parametrize("label", [lab for lab, _ in _bad_expressions(Path("."))])
def test_expression_compiler_refuses_and_runs_nothing(tmp_path, label):
    sentinel = tmp_path / "SENTINEL"
    source = dict(_bad_expressions(sentinel))[label]
    with pytest.raises(ExpressionError) as info:
        compile_expression(source, {"x", "beta"})
    msg = str(info.value)
    assert source in msg or repr(source) in msg  # names what was given
    assert "allowed" in msg or "takes" in msg  # says what is allowed instead
    assert not sentinel.exists(), "the expression was executed"


def test_expression_compiler_evaluates_only_the_arithmetic_it_accepts():
    """Positive control, so the refusals above are not a compiler that refuses everything."""
    expr = compile_expression("beta * S * I / N + max(x, 0.5) ** 2 - exp(-t)", {"beta", "S", "I", "N", "x", "t"})
    rng = np.random.Generator(np.random.PCG64(3))
    env = {k: rng.uniform(0.1, 2.0, 5) for k in ("beta", "S", "I", "N", "x")}
    env["t"] = 1.5
    want = env["beta"] * env["S"] * env["I"] / env["N"] + np.maximum(env["x"], 0.5) ** 2 - np.exp(-1.5)
    np.testing.assert_allclose(expr(env), want, rtol=1e-14)
    assert expr.names == frozenset({"beta", "S", "I", "N", "x", "t"})


def test_contact_matrix_wrong_shape(tmp_path):
    text = _edit(
        _example_text("seir_two_band"),
        "contact = [[2.0, 0.6], [0.6, 1.0]]",
        "contact = [[2.0, 0.6, 0.1], [0.6, 1.0, 0.1]]",
    )
    msg = str(_load_error(_write(tmp_path, "contact_shape", text)))
    assert "transmission.contact" in msg  # field path
    assert "must be 2x2" in msg  # allowed
    assert "got 2x3" in msg  # given


def test_contact_matrix_missing_with_two_groups(tmp_path):
    text = _edit(_example_text("seir_two_band"), "contact = [[2.0, 0.6], [0.6, 1.0]]", "")
    msg = str(_load_error(_write(tmp_path, "contact_missing", text)))
    assert "transmission.contact" in msg and "2x2" in msg and "required with 2 groups" in msg


def test_negbin_noise_without_dispersion(tmp_path):
    text = _edit(_example_text("seir"), 'noise = { dist = "negbin", dispersion = "k" }', 'noise = { dist = "negbin" }')
    path = _write(tmp_path, "negbin", text)
    exc = _load_error(path)
    line = _line_of(text, r'^noise = \{ dist = "negbin" \}')
    assert f"{path}:{line}: field series[0].noise:" in str(exc)
    assert "negbin noise needs 'dispersion'" in str(exc)  # what is missing / allowed


def test_binomial_noise_with_delay(tmp_path):
    text = _edit(_example_text("seir"), 'noise = { dist = "negbin", dispersion = "k" }', 'noise = { dist = "binomial" }')
    path = _write(tmp_path, "binomial_delay", text)
    exc = _load_error(path)
    line = _line_of(text, r"^\[\[series\]\]")
    assert f"{path}:{line}: field series[0]:" in str(exc)
    assert "binomial noise" in str(exc) and "delay" in str(exc)
    assert "use poisson or negbin" in str(exc)  # what is allowed


def test_fixed_parameter_without_value(tmp_path):
    text = _edit(_example_text("sir"), 'kind = "fixed"\nvalue = 0.25', 'kind = "fixed"')
    path = _write(tmp_path, "fixed", text)
    exc = _load_error(path)
    line = _line_of(text, r"^\[parameters\.gamma\]")
    assert f"{path}:{line}: field parameters.gamma:" in str(exc)
    assert "a fixed parameter needs 'value'" in str(exc)


def test_logit_scale_with_unbounded_prior(tmp_path):
    text = _edit(
        _example_text("sir"),
        'prior = { dist = "uniform", low = 0.1, high = 1.0 }',
        'prior = { dist = "lognormal", mean_log = -1.0, sd_log = 0.3 }\nscale = "logit"',
    )
    msg = str(_load_error(_write(tmp_path, "logit", text)))
    assert "parameter 'beta'" in msg and "logit" in msg
    assert "uniform or beta" in msg and "got lognormal" in msg


@pytest.mark.parametrize(
    "label, old, new, expected",
    [
        ("flow", 'name = "recovery"', 'name = "infection"', "flow names must be unique, repeated: ['infection']"),
        ("compartment", 'compartments = ["S", "I", "R"]', 'compartments = ["S", "I", "R", "I"]',
         "compartment names must be unique, repeated: ['I']"),
        ("parameter_vs_compartment", "[parameters.gamma]", "[parameters.I]", "names ['I'] are used twice or are reserved"),
        ("reserved", "[parameters.gamma]", "[parameters.N]", "names ['N'] are used twice or are reserved"),
    ],
)
def test_duplicate_names(tmp_path, label, old, new, expected):
    msg = str(_load_error(_write(tmp_path, label, _edit(_example_text("sir"), old, new))))
    assert expected in msg


def test_field_error_names_line_path_given_and_allowed(tmp_path):
    text = _edit(_example_text("sir"), "population = 100000", "population = -5")
    path = _write(tmp_path, "population", text)
    msg = str(_load_error(path))
    line = _line_of(text, r"^population = -5")
    assert f"{path}:{line}: field groups[0].population:" in msg
    assert "greater than 0" in msg and "(given -5)" in msg


def test_invalid_toml_syntax(tmp_path):
    text = _edit(_example_text("sir"), "population = 100000", "population = = 100000")
    path = _write(tmp_path, "syntax", text)
    msg = str(_load_error(path))
    assert "not valid TOML" in msg
    assert f"line {_line_of(text, r'^population = = ')}" in msg


def test_missing_file(tmp_path):
    path = tmp_path / "no_such_model.toml"
    msg = str(_load_error(path))
    assert "cannot read file" in msg and "No such file" in msg


def test_every_problem_is_reported_at_once(tmp_path):
    text = _example_text("sir")
    text = _edit(text, 'to = "I"\nrate = "beta * foi"', 'to = "Q"\nrate = "beta * foi"')
    text = _edit(text, "population = 100000", "population = 0")
    text = _edit(text, 'noise = { dist = "poisson" }', 'noise = { dist = "negbin" }')
    exc = _load_error(_write(tmp_path, "many", text))
    # Field-level errors are listed together (the cross-reference check runs only on a
    # document whose fields are valid, so 'Q' is reported once the others are fixed).
    assert len(exc.problems) >= 2
    assert any("groups[0].population" in p for p in exc.problems)
    assert any("series[0].noise" in p for p in exc.problems)
    assert f"{len(exc.problems)} problem(s)" in str(exc)


@pytest.mark.parametrize(
    "label, old, new, expected",
    [
        # (field path, what was given, what is allowed), each as it must appear in the problem text.
        ("cross_reference", 'to = "I"\nrate = "beta * foi"', 'to = "Q"\nrate = "beta * foi"',
         ("flows[0].to", "given 'Q'", "allowed: ['S', 'I', 'R']")),
        ("field", "population = 100000", "population = -5",
         ("groups[0].population", "given -5", "greater than 0")),
        ("toml", "population = 100000", "population = = 100000",
         ("not valid TOML", "line 9, column 14", "Invalid value")),
    ],
)
def test_nothing_half_built_is_returned(tmp_path, label, old, new, expected):
    text = _edit(_example_text("sir"), old, new)
    path = _write(tmp_path, label, text)
    exc = _load_error(path)
    # The refusal says where, what was given and what is allowed (the line is found in the edited text).
    assert len(exc.problems) == 1, exc.problems
    problem = exc.problems[0]
    for part in expected:
        assert part in problem, (part, problem)
    if label != "toml":
        assert f"{path}:{_line_of(text, re.escape(new.splitlines()[0]))}:" in problem, problem
    # The error carries text only: no spec object, no pydantic error chained as cause.
    assert all(isinstance(p, str) for p in exc.problems)
    assert exc.__cause__ is None and exc.__suppress_context__
    assert not any(isinstance(v, schemas.ModelSpec) for v in (*exc.args, *vars(exc).values()))
    # The loader keeps no state: the good example still loads, unchanged.
    good = schemas.load_model_spec(schemas.example_model_path("sir"))
    assert good.flows[0].target == "I" and good.groups[0].population == 100000


def test_model_compile_failure_returns_nothing(tmp_path):
    text = _edit(_example_text("sir"), 'rate = "gamma"', 'rate = "gamma[0]"')
    spec = schemas.load_model_spec(_write(tmp_path, "subscript", text))
    with pytest.raises(ModelError) as info:
        CompartmentalModel(spec)
    assert "'gamma[0]'" in str(info.value) and "flows[1] (recovery).rate" in str(info.value)
