"""A synthetic population drawn from a :class:`schemas.PopulationSpec`.

Everything is drawn from one ``numpy.random.Generator(PCG64(seed))`` using
uniform variates only (``Generator.random``); permutations are stable argsorts
of uniforms and sizes are inverse-CDF lookups. So a population depends on the
spec alone and is identical on every machine with the same numpy bit generator
(a test pins its SHA-256).

How a town is drawn
-------------------
1. Band sizes: ``share x size`` rounded by largest remainder (ties to the
   earlier band), so they add up to ``size`` exactly.
2. Household sizes are drawn until they cover everyone; the last household
   takes whoever is left. People are numbered household by household, so the
   members of household ``h`` are ``household_start[h] .. household_start[h+1]-1``.
3. The first member of every household is drawn from ``head_bands`` (without
   replacement from the band totals); the other places are filled with the
   remaining people in random order.
4. Each setting in turn: a person of band ``b`` belongs with probability
   ``members[b]``; members are put in random order (households kept together
   if asked) and cut into places whose sizes are drawn from the setting's size
   distribution; the last place takes whoever is left.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

import numpy as np
from scipy import stats

from schemas import DiscreteSize, GammaSize, PopulationSpec

__all__ = ["Population", "Venues", "PopulationError", "build_population", "size_pmf"]


class PopulationError(ValueError):
    """A population spec cannot be drawn (e.g. too few people to head every household)."""


@dataclass(frozen=True)
class Venues:
    """The places of one kind (households, or one setting such as schools).

    venue : ndarray of shape (people,), int32: the place of each person, -1 for none.
    start : ndarray of shape (places + 1,), int64: offsets into ``members``.
    members : ndarray of shape (members,), int32: people sorted by place.
    """

    name: str
    venue: np.ndarray
    start: np.ndarray
    members: np.ndarray

    @property
    def sizes(self) -> np.ndarray:
        return np.diff(self.start)

    @property
    def count(self) -> int:
        return int(self.start.size - 1)


@dataclass(frozen=True)
class Population:
    """People with an age band, a household and their places in each setting.

    band : ndarray of shape (people,), int8: index into ``band_names``.
    households : Venues (members are contiguous: people are numbered by household).
    settings : one Venues per setting of the spec, in spec order.
    """

    name: str
    band_names: list[str]
    band: np.ndarray
    households: Venues
    settings: list[Venues]

    @property
    def size(self) -> int:
        return int(self.band.size)

    def band_counts(self) -> np.ndarray:
        return np.bincount(self.band, minlength=len(self.band_names))

    def digest(self) -> str:
        """SHA-256 of every array (reproducibility pin)."""
        h = hashlib.sha256()
        for venues in [self.households, *self.settings]:
            for a in (venues.venue, venues.start, venues.members):
                h.update(np.ascontiguousarray(a).tobytes())
        h.update(np.ascontiguousarray(self.band).tobytes())
        return h.hexdigest()


def size_pmf(size: int | DiscreteSize | GammaSize) -> tuple[np.ndarray, np.ndarray]:
    """(values, probabilities) of a size distribution over whole sizes.

    A gamma distribution is rounded to the nearest whole size, the smallest
    size taking all the mass below it and the largest all the mass above it
    (values from ``min`` to ``max``)."""
    if isinstance(size, int):
        return np.array([size], dtype=np.int64), np.ones(1)
    if isinstance(size, DiscreteSize):
        w = np.asarray(size.weights, dtype=float)
        return np.asarray(size.values, dtype=np.int64), w / w.sum()
    values = np.arange(size.min, size.upper + 1, dtype=np.int64)
    shape = (size.mean / size.sd) ** 2
    cdf = stats.gamma.cdf(values[:-1] + 0.5, shape, scale=size.sd**2 / size.mean)
    mass = np.diff(np.concatenate([[0.0], cdf, [1.0]]))
    return values, mass / mass.sum()


def _inverse_cdf(probs: np.ndarray, u: np.ndarray) -> np.ndarray:
    cdf = np.cumsum(probs)
    cdf[-1] = 1.0
    return np.minimum(np.searchsorted(cdf, u, side="right"), probs.size - 1)


def _permutation(rng: np.random.Generator, n: int) -> np.ndarray:
    return np.argsort(rng.random(n), kind="stable")


def _cover(values: np.ndarray, probs: np.ndarray, total: int, rng: np.random.Generator) -> np.ndarray:
    """Sizes drawn until they add up to at least ``total``; the last is cut so they add up to exactly ``total``."""
    if total == 0:
        return np.zeros(0, dtype=np.int64)
    mean = float(values @ probs)
    drawn: list[np.ndarray] = []
    covered = 0
    while covered < total:
        batch = int((total - covered) / mean * 1.05) + 16
        sizes = values[_inverse_cdf(probs, rng.random(batch))]
        drawn.append(sizes)
        covered += int(sizes.sum())
    sizes = np.concatenate(drawn)
    cum = np.cumsum(sizes)
    last = int(np.searchsorted(cum, total))
    sizes = sizes[: last + 1].copy()
    sizes[-1] -= int(cum[last]) - total
    return sizes


def _band_counts(shares: list[float], size: int) -> np.ndarray:
    raw = np.asarray(shares, dtype=float) / sum(shares) * size
    counts = np.floor(raw).astype(np.int64)
    short = size - int(counts.sum())
    order = np.argsort(-(raw - counts), kind="stable")
    counts[order[:short]] += 1
    return counts


def build_population(spec: PopulationSpec) -> Population:
    """Draw the town ``spec`` describes (see the module docstring)."""
    rng = np.random.Generator(np.random.PCG64(spec.seed))
    people = spec.size
    names = spec.band_names
    counts = _band_counts([b.share for b in spec.bands], people)
    # Households.
    values, probs = size_pmf(spec.households.size)
    sizes = _cover(values, probs, people, rng)
    households = sizes.size
    start = np.concatenate([[0], np.cumsum(sizes)]).astype(np.int64)
    heads_from = [names.index(b) for b in (spec.households.head_bands or names)]
    eligible = np.repeat(np.array(heads_from, dtype=np.int8), counts[heads_from])
    if eligible.size < households:
        raise PopulationError(
            f"population {spec.name!r}: {households} households need a first member from bands "
            f"{[names[b] for b in heads_from]}, which hold {eligible.size} people; widen households.head_bands, "
            "raise those bands' shares or make one-person households rarer"
        )
    eligible = eligible[_permutation(rng, eligible.size)]
    others = [np.repeat(np.int8(b), counts[b]) for b in range(len(names)) if b not in heads_from]
    rest = np.concatenate([eligible[households:], *others]).astype(np.int8)
    rest = rest[_permutation(rng, rest.size)]
    band = np.empty(people, dtype=np.int8)
    is_head = np.zeros(people, dtype=bool)
    is_head[start[:-1]] = True
    band[is_head] = eligible[:households]
    band[~is_head] = rest
    household = np.repeat(np.arange(households, dtype=np.int32), sizes)
    home = Venues("household", household, start, np.arange(people, dtype=np.int32))
    # Settings.
    settings = []
    for setting in spec.settings:
        p = np.zeros(len(names))
        for b, share in setting.members.items():
            p[names.index(b)] = share
        members = np.flatnonzero(rng.random(people) < p[band]).astype(np.int32)
        if setting.keep_households_together:
            rank = np.empty(households, dtype=np.int64)
            rank[_permutation(rng, households)] = np.arange(households)
            members = members[np.argsort(rank[household[members]] * people + members, kind="stable")]
        else:
            members = members[_permutation(rng, members.size)]
        values, probs = size_pmf(setting.size)
        place_sizes = _cover(values, probs, members.size, rng)
        venue = np.full(people, -1, dtype=np.int32)
        venue[members] = np.repeat(np.arange(place_sizes.size, dtype=np.int32), place_sizes)
        offsets = np.concatenate([[0], np.cumsum(place_sizes)]).astype(np.int64)
        settings.append(Venues(setting.name, venue, offsets, members))
    return Population(spec.name, list(names), band, home, settings)
