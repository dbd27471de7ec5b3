"""The isotherm model catalogue. Adding a model: one class (its own module
here) plus one entry in ``_REGISTERED``; DEVELOPERS.md "Adding a model".

``models="all"`` means the default set (``default_models``): every model
whose class keeps ``in_default_catalogue = True``. An opt-in model is fitted
only where a caller names it (``--models all,jovanovic``)."""
from __future__ import annotations

from importlib import import_module

from .base import IsothermModel, Param

# Every model, as "<module in this package>.<class>", in catalogue order: the
# order of listings and of the fitted models' columns.
_REGISTERED = (
    "henry.Henry",
    "langmuir.Langmuir",
    "dual_site_langmuir.DualSiteLangmuir",
    "freundlich.Freundlich",
    "sips.Sips",
    "toth.Toth",
    "redlich_peterson.RedlichPeterson",
    "temkin.Temkin",
    "bet.BET",
    "bet.GAB",
    "dubinin.DubininRadushkevich",
    "dubinin.DubininAstakhov",
    # opt-in models (in_default_catalogue = False) last, so listings show the
    # default set first
    "jovanovic.Jovanovic",
)


def _load(entry: str) -> type[IsothermModel]:
    module, name = entry.split(".")
    return getattr(import_module(f".{module}", __name__), name)


_MODELS: list[type[IsothermModel]] = [_load(entry) for entry in _REGISTERED]

CATALOGUE: dict[str, type[IsothermModel]] = {m.id: m for m in _MODELS}


def get_model(model_id: str) -> type[IsothermModel]:
    try:
        return CATALOGUE[model_id]
    except KeyError:
        known = ", ".join(sorted(CATALOGUE))
        raise KeyError(f"unknown model {model_id!r}; known models: {known}") from None


def default_models() -> list[type[IsothermModel]]:
    """The models ``models="all"`` fits, in catalogue order."""
    return [m for m in _MODELS if m.in_default_catalogue]


def catalogue_description() -> list[dict]:
    return [m.describe() for m in _MODELS]


__all__ = ["CATALOGUE", "IsothermModel", "Param", "catalogue_description", "default_models",
           "get_model"]
