"""Draws from the cloud's nowcast of eventual counts, for scoring (backtests).

:func:`filters.nowcast` summarises each pending period by weighted quantiles
of one eventual-count draw per particle. Proper scores from draws (CRPS, the
log score) and quantiles at many levels (WIS) want a sample of a chosen size
instead: :func:`nowcast_draws` picks ``m`` particles by weight (systematic
resampling, as :func:`filters.forecast` does) and draws, for each picked
particle, the reports still to come with the same increment model
(:meth:`CompartmentalModel.sample_increment` from the known as-of day to
"final"). The eventual count is the total reported so far plus that draw.
The particles are picked once and shared by all periods, so the draws of
different periods of one call are joint draws.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from ._reports import Report
from ._resampling import resample

__all__ = ["nowcast_draws"]


def nowcast_draws(
    model,
    particles,
    weights: np.ndarray,
    known: Mapping[str, Mapping[int, tuple[float, int | None]]],
    now: int,
    m: int,
    rng: np.random.Generator,
) -> dict[tuple[str, int], np.ndarray]:
    """(m,) draws of the eventual count of every pending (series, period), keyed by (series, model day).

    known : series -> model day -> (total reported so far, as-of day or None for final),
        as the stream state keeps it. Final values and periods outside the
        model's window are left out; series are visited in the model's order
        and days oldest first, so the draws are reproducible.
    """
    if m < 1:
        raise ValueError(f"m must be at least 1, got {m}")
    w = np.asarray(weights, dtype=float)
    picked = particles.take(resample(w / w.sum(), rng, "systematic", n=int(m)))
    out: dict[tuple[str, int], np.ndarray] = {}
    for s in model.series:
        if not getattr(s, "event_dated", False):
            continue
        for day, (total, as_of) in sorted(known.get(s.name, {}).items()):
            if as_of is None or not 0 <= now - day <= model.window_days:
                continue
            pending = Report(s.name, day, total, None, total, as_of)
            out[(s.name, day)] = float(total) + model.sample_increment(picked, pending, now, rng).astype(float)
    return out
