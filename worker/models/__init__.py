"""The isotherm model catalogue. Adding a model: one class + one line here."""
from __future__ import annotations

from .base import IsothermModel, Param
from .bet import BET, GAB
from .dual_site_langmuir import DualSiteLangmuir
from .dubinin import DubininAstakhov, DubininRadushkevich
from .freundlich import Freundlich
from .henry import Henry
from .langmuir import Langmuir
from .redlich_peterson import RedlichPeterson
from .sips import Sips
from .temkin import Temkin
from .toth import Toth

_MODELS: list[type[IsothermModel]] = [
    Henry,
    Langmuir,
    DualSiteLangmuir,
    Freundlich,
    Sips,
    Toth,
    RedlichPeterson,
    Temkin,
    BET,
    GAB,
    DubininRadushkevich,
    DubininAstakhov,
]

CATALOGUE: dict[str, type[IsothermModel]] = {m.id: m for m in _MODELS}


def get_model(model_id: str) -> type[IsothermModel]:
    try:
        return CATALOGUE[model_id]
    except KeyError:
        known = ", ".join(sorted(CATALOGUE))
        raise KeyError(f"unknown model {model_id!r}; known models: {known}") from None


def catalogue_description() -> list[dict]:
    return [m.describe() for m in _MODELS]


__all__ = ["CATALOGUE", "IsothermModel", "Param", "get_model", "catalogue_description"]
