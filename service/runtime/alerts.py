"""Exceedance alerts: one small state machine per (stream, rule).

Raise when the exceedance probability has been at or above ``raise_level``
for ``persistence`` consecutive updates; while raised, publish an update when
the probability moves by at least ``UPDATE_STEP``; clear when it falls below
``clear_level``. The gap between the two levels (hysteresis) stops a
probability that hovers around one level from flapping.
"""

from __future__ import annotations

import uuid
from dataclasses import asdict, dataclass
from typing import Literal

from schemas import AlertRule

__all__ = ["AlertState", "AlertDecision", "decide", "ALERT_NAMESPACE", "UPDATE_STEP"]

ALERT_NAMESPACE = uuid.UUID("6f1c2a8e-4b7d-5e3f-9a10-2c3d4e5f6a7b")
UPDATE_STEP = 0.05


@dataclass(frozen=True)
class AlertState:
    active: bool = False
    alert_id: str | None = None
    above: int = 0
    last_probability: float | None = None

    def to_json(self) -> dict:
        return asdict(self)

    @classmethod
    def from_json(cls, data: dict) -> "AlertState":
        return cls(**data)


@dataclass(frozen=True)
class AlertDecision:
    state: AlertState
    status: Literal["raised", "updated", "cleared"] | None


def decide(rule: AlertRule, state: AlertState, probability: float, stream: str, period: str) -> AlertDecision:
    """Next state and the status to publish (None: publish nothing)."""
    if not state.active:
        above = state.above + 1 if probability >= rule.raise_level else 0
        if above >= rule.persistence:
            alert_id = str(uuid.uuid5(ALERT_NAMESPACE, f"{stream}|{rule.name}|{period}"))
            return AlertDecision(AlertState(True, alert_id, above, probability), "raised")
        return AlertDecision(AlertState(False, None, above, None), None)
    if probability < rule.clear_level:
        return AlertDecision(AlertState(False, state.alert_id, 0, probability), "cleared")
    last = state.last_probability if state.last_probability is not None else probability
    if abs(probability - last) >= UPDATE_STEP:
        return AlertDecision(AlertState(True, state.alert_id, state.above, probability), "updated")
    return AlertDecision(state, None)
