"""stimforge: build and verify frequency-tagging speech stimuli, then analyse the recorded
responses at the same rates, from one declarative recipe.

``import stimforge`` is cheap: the stages load when first used (PEP 562), so
``stimforge.build``, ``stimforge.check``, ``stimforge.load_recipe`` and
``stimforge.read_build`` are reachable without importing pydantic, scipy or the audio stack
up front.
"""

from __future__ import annotations

import importlib
from types import ModuleType
from typing import Any

from ._version import __version__
from .errors import (
    AnalysisError,
    AudioInputError,
    BuildError,
    CheckInputError,
    CorpusError,
    DesignError,
    EpochError,
    GridError,
    RecipeError,
    RetimeError,
    StatsError,
    StimforgeError,
)

#: public name -> (module, attribute)
_LAZY = {
    "build": ("build", "build"),
    "BuildResult": ("build", "BuildResult"),
    "check": ("verify", "check"),
    "check_build": ("verify", "check_build"),
    "check_files": ("verify", "check_files"),
    "CheckReport": ("verify_report", "CheckReport"),
    "load_recipe": ("recipe", "load_recipe"),
    "recipe_from_dict": ("recipe", "recipe_from_dict"),
    "Recipe": ("recipe", "Recipe"),
    # the same result object as build(); audio_io.read_build keeps the plain tables
    "read_build": ("build", "open_build"),
    "open_build": ("build", "open_build"),
    "preflight": ("preflight", "preflight"),
    "RateTable": ("grid", "RateTable"),
    "rate_table": ("grid", "rate_table"),
    "grid_from_numbers": ("grid", "grid_from_numbers"),
    "epoch_recording": ("epochs", "epoch_recording"),
    "analyze": ("response", "analyze"),
    "load_epochs": ("response", "load_epochs"),
    "ResponseAnalysis": ("response", "ResponseAnalysis"),
    "plan_power": ("planner", "plan_power"),
}

__all__ = [
    "__version__",
    *_LAZY,
    "StimforgeError",
    "RecipeError",
    "CorpusError",
    "AudioInputError",
    "RetimeError",
    "DesignError",
    "BuildError",
    "CheckInputError",
    "GridError",
    "StatsError",
    "AnalysisError",
    "EpochError",
]


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        mod, attr = _LAZY[name]
        value = getattr(importlib.import_module(f".{mod}", __name__), attr)
        globals()[name] = value
        # importing a submodule binds it on the package under its own name (stimforge.build
        # the module over stimforge.build the function): the public function wins
        for n, (m, a) in _LAZY.items():
            if n == m and isinstance(globals().get(n), ModuleType):
                globals()[n] = getattr(globals()[n], a)
        return value
    raise AttributeError(f"module 'stimforge' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_LAZY))
