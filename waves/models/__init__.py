"""Excitable-medium models and their registry.

`get_model(name)` returns a model's `ModelSpec` (see `waves.models.base` for
the contract a model module meets).  Models are imported on first use, so
importing `waves.models` compiles nothing.  To add a model, write its module
and add one line to `_MODULES`; a listed module that is not present (e.g. a
model still being written) is skipped by `available_models()`.
"""

from __future__ import annotations

import importlib

from waves.errors import WavesError

__all__ = ["get_model", "available_models", "MODELS"]

# model name -> module defining SPEC
_MODULES: dict[str, str] = {
    "barkley": "waves.models.barkley",
    "fhn": "waves.models.fhn",
    "nagumo": "waves.models.nagumo",
    "relay": "waves.models.relay",
}

# names a user may type for a model
_ALIASES: dict[str, str] = {
    "fitzhugh-nagumo": "fhn",
    "fitzhugh_nagumo": "fhn",
    "fitzhughnagumo": "fhn",
    "bistable": "nagumo",
    "martiel-goldbeter": "relay",
    "camp": "relay",
}

MODELS = tuple(_MODULES)


def _load(name: str):
    module_name = _MODULES[name]
    try:
        module = importlib.import_module(module_name)
    except ModuleNotFoundError as exc:
        if exc.name == module_name:
            return None
        raise
    return getattr(module, "SPEC", None)


def available_models() -> tuple[str, ...]:
    """Names of the models whose module is present."""
    return tuple(n for n in _MODULES if _load(n) is not None)


def get_model(name: str):
    """The `ModelSpec` of model `name` (case-insensitive; aliases accepted)."""
    key = str(name).strip().lower()
    key = _ALIASES.get(key, key)
    spec = _load(key) if key in _MODULES else None
    if spec is None:
        raise WavesError(
            f"unknown model {name!r}; choose one of {', '.join(available_models())}"
        )
    return spec
