"""One entry point for every model family a spec file can declare."""

from __future__ import annotations

from schemas import IndividualModelSpec, ModelSpec

from ._compartmental import CompartmentalModel
from ._individual import IndividualModel

__all__ = ["build_model"]


def build_model(spec: ModelSpec | IndividualModelSpec, window_days: int | None = None) -> CompartmentalModel | IndividualModel:
    """The model a spec describes: :class:`CompartmentalModel` for a ``ModelSpec``,
    :class:`IndividualModel` for an ``IndividualModelSpec`` (see ``schemas.load_spec``)."""
    if isinstance(spec, IndividualModelSpec):
        return IndividualModel(spec, window_days=window_days)
    if isinstance(spec, ModelSpec):
        return CompartmentalModel(spec, window_days=window_days)
    raise TypeError(f"build_model needs a ModelSpec or an IndividualModelSpec, got {type(spec).__name__}")
