"""Nowcasts of event-dated series: what recent periods will eventually count.

For each recent period the cloud knows a total reported so far (as of some
day). Each particle's eventual count is that total plus the reports still to
come, drawn from the same increment model that assimilates revisions
(:meth:`CompartmentalModel.sample_increment` between the known as-of day and
"final"). Under Poisson noise the reports still to come are independent of
those already seen given the particle (thinning), so the draw is exact for
the particle; the cloud's weights carry what the reports so far said.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from ._reports import Report
from ._summary import weighted_quantiles

__all__ = ["NowcastEntry", "nowcast"]


@dataclass(frozen=True)
class NowcastEntry:
    """One period of one event-dated series."""

    series: str
    time: int  # model day the period ends on
    reported: float
    as_of: int | None
    mean: float
    quantiles: dict[float, float]
    share_pending: float


def nowcast(
    model,
    particles,
    weights: np.ndarray,
    known: Mapping[str, Mapping[int, tuple[float, int | None]]],
    now: int,
    rng: np.random.Generator,
    probs: tuple[float, ...],
) -> list[NowcastEntry]:
    """Eventual counts of every known (series, period) of the model's event-dated series.

    known : series -> model day -> (total reported so far, as-of day or None for final).
    Periods outside the model's window are left out; series are visited in the
    model's order and days oldest first, so the draws are reproducible.
    """
    out: list[NowcastEntry] = []
    probs_arr = np.asarray(probs, dtype=float)
    for s in model.series:
        if not getattr(s, "event_dated", False):
            continue
        for day, (total, as_of) in sorted(known.get(s.name, {}).items()):
            if not 0 <= now - day <= model.window_days:
                continue
            pending = Report(s.name, day, total, None, total, as_of)
            if as_of is None:
                remaining = np.zeros(particles.size)
                expected_pending = 0.0
            else:
                mu = model.report_mean(particles, pending, now)
                remaining = model.sample_increment(particles, pending, now, rng, mean=mu).astype(float)
                expected_pending = float(weights @ mu)
            eventual = total + remaining
            mean = float(total + weights @ remaining)
            q = weighted_quantiles(eventual, weights, probs_arr)
            out.append(
                NowcastEntry(
                    series=s.name,
                    time=day,
                    reported=float(total),
                    as_of=as_of,
                    mean=mean,
                    quantiles={float(p): float(v) for p, v in zip(probs_arr, q)},
                    share_pending=expected_pending / (total + expected_pending) if total + expected_pending > 0 else 0.0,
                )
            )
    return out
