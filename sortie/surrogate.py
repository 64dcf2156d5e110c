"""The surrogate models under their former name; they live in :mod:`sortie.models`, one module per model.

Kept so that ``from sortie.surrogate import GaussianProcessSurrogate`` (and the private helpers the
tests check) keep working.
"""

from sortie.models import (
    GaussianProcessSurrogate,
    ModelScore,
    QuadraticSurface,
    RadialBasisSurrogate,
    Surrogate,
    choose_surrogate,
    make_surrogate,
)
from sortie.models.gp import _neg_log_posterior

__all__ = [
    "GaussianProcessSurrogate",
    "ModelScore",
    "QuadraticSurface",
    "RadialBasisSurrogate",
    "Surrogate",
    "_neg_log_posterior",
    "choose_surrogate",
    "make_surrogate",
]
