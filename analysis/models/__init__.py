"""Model families and their registry.

To add a family: write a small module with a :class:`~.base.ModelFamily` subclass and add one line to
:data:`FAMILIES` (see DEVELOPERS.md).
"""

from __future__ import annotations

from .base import FitContext, ModelFamily, Parameter, SumFamily
from .inertial import Inertial, InertialFollowing
from .matern import Matern, matern_correlation, matern_correlation_exact

#: name -> factory for every registered family
FAMILIES = {
    "matern": lambda: Matern(),
    "inertial": lambda: Inertial(),
    "matern+inertial": lambda: SumFamily(Matern(), Inertial(), name="matern+inertial"),
}


def get_family(name: str, inertial_frequency: str = "free") -> ModelFamily:
    """The family registered under ``name``.

    ``inertial_frequency="follow-latitude"`` replaces a constant-frequency inertial part by the
    latitude-following one.
    """
    if isinstance(name, ModelFamily):
        return name
    if name not in FAMILIES:
        raise ValueError(f"unknown model {name!r}; choose from {', '.join(FAMILIES)}")
    if inertial_frequency not in ("free", "follow-latitude"):
        raise ValueError("inertial_frequency must be 'free' or 'follow-latitude'")
    fam = FAMILIES[name]()
    if inertial_frequency == "follow-latitude":
        if name == "inertial":
            return InertialFollowing()
        if name == "matern+inertial":
            return SumFamily(Matern(), InertialFollowing(), name="matern+inertial")
    return fam


__all__ = ["FAMILIES", "FitContext", "Inertial", "InertialFollowing", "Matern", "ModelFamily", "Parameter",
           "SumFamily", "get_family", "matern_correlation", "matern_correlation_exact"]
