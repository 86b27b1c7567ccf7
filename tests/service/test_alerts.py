"""The alert state machine, ``service.runtime.alerts.decide``, on hand-made probability paths."""

from __future__ import annotations

import pytest

from schemas import AlertRule
from service.runtime.alerts import UPDATE_STEP, AlertState, decide


def rule(**kw) -> AlertRule:
    base = {"name": "icu_surge", "series": "cases", "threshold": 40, "raise_level": 0.8, "clear_level": 0.5}
    return AlertRule(**{**base, **kw})


def walk(r: AlertRule, probabilities, stream: str = "s1", first_day: int = 1):
    """Feed a path through decide; one period per probability."""
    state = AlertState()
    out = []
    for i, p in enumerate(probabilities):
        decision = decide(r, state, p, stream, f"2026-01-{first_day + i:02d}")
        state = decision.state
        out.append((decision.status, state))
    return out


def statuses(steps):
    return [s for s, _ in steps]


def test_oscillation_around_raise_level_raises_once_and_never_clears():
    path = [0.79, 0.81, 0.78, 0.82, 0.79, 0.81, 0.77, 0.83, 0.78, 0.80]
    got = statuses(walk(rule(), path))
    assert got.count("raised") == 1
    assert got.index("raised") == 1  # the first value at or above 0.8
    assert "cleared" not in got
    assert "updated" not in got  # every move stays within UPDATE_STEP of 0.81


def test_without_hysteresis_the_same_path_would_flap():
    # clear level just below the raise level: the path now clears and re-raises
    got = statuses(walk(rule(clear_level=0.795), [0.79, 0.81, 0.78, 0.82, 0.79]))
    assert got == [None, "raised", "cleared", "raised", "cleared"]


def test_raise_level_is_inclusive():
    assert statuses(walk(rule(), [0.8])) == ["raised"]
    assert statuses(walk(rule(), [0.7999999])) == [None]


@pytest.mark.parametrize("k", [1, 2, 3, 5])
def test_persistence_requires_k_consecutive_updates(k):
    r = rule(persistence=k)
    # k-1 highs, one dip, then exactly k highs
    path = [0.9] * (k - 1) + [0.7] + [0.9] * k
    got = statuses(walk(r, path))
    assert got[: 2 * k - 1] == [None] * (2 * k - 1)
    assert got[-1] == "raised"


def test_persistence_counter_resets_on_a_dip_below_raise_level():
    got = statuses(walk(rule(persistence=3), [0.85, 0.85, 0.79, 0.85, 0.85, 0.85]))
    assert got == [None, None, None, None, None, "raised"]


def test_clears_only_below_clear_level():
    got = statuses(walk(rule(), [0.9, 0.6, 0.5, 0.49]))
    # 0.6 is an update (moved 0.3); 0.5 is not below 0.5 but moved 0.1: update; 0.49 clears
    assert got == ["raised", "updated", "updated", "cleared"]


def test_after_clearing_a_new_raise_needs_the_raise_level_again():
    got = statuses(walk(rule(), [0.9, 0.3, 0.7, 0.75, 0.79, 0.8]))
    assert got == ["raised", "cleared", None, None, None, "raised"]


def test_alert_id_is_stable_within_an_episode_and_new_for_the_next():
    steps = walk(rule(), [0.85, 0.95, 0.86, 0.99, 0.2, 0.9, 0.97])
    assert statuses(steps) == ["raised", "updated", "updated", "updated", "cleared", "raised", "updated"]
    ids = [state.alert_id for _, state in steps]
    first, second = ids[0], ids[5]
    assert first and second and first != second
    assert ids[:5] == [first] * 5  # the clear message carries the episode's id
    assert ids[5:] == [second] * 2


def test_alert_id_is_deterministic_and_distinct_per_stream_and_rule():
    a = walk(rule(), [0.9])[0][1].alert_id
    assert walk(rule(), [0.9])[0][1].alert_id == a  # re-running gives the same id
    assert walk(rule(), [0.9], stream="s2")[0][1].alert_id != a
    assert walk(rule(name="other"), [0.9])[0][1].alert_id != a


def test_updated_only_on_moves_of_at_least_update_step():
    assert UPDATE_STEP == 0.05
    # relative to the last *published* probability: small drifts accumulate
    path = [0.8, 0.84, 0.87, 0.9, 0.875, 0.85, 0.85]
    got = statuses(walk(rule(), path))
    # 0.84 (+0.04) no; 0.87 (+0.07 from 0.8) yes; 0.9 (+0.03) no; 0.875 (+0.005) no; 0.85 (-0.02) no
    assert got == ["raised", None, "updated", None, None, None, None]
    steps = walk(rule(), [0.8, 0.875, 0.8])
    assert statuses(steps) == ["raised", "updated", "updated"]  # downward moves count too
    assert steps[-1][1].last_probability == 0.8


def test_state_round_trips_through_json():
    _, state = walk(rule(persistence=2), [0.9, 0.95])[-1]
    assert state.active
    assert AlertState.from_json(state.to_json()) == state
