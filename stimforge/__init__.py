"""stimforge: build and verify frequency-tagging speech stimuli from one declarative recipe."""

from __future__ import annotations

__version__ = "0.1.0"

from .errors import (  # noqa: E402
    AudioInputError,
    BuildError,
    CheckInputError,
    CorpusError,
    DesignError,
    RecipeError,
    RetimeError,
    StimforgeError,
)
from .recipe import Recipe, RateTable, load_recipe, rate_table, recipe_from_dict  # noqa: E402

__all__ = [
    "__version__",
    "Recipe",
    "RateTable",
    "load_recipe",
    "recipe_from_dict",
    "rate_table",
    "StimforgeError",
    "RecipeError",
    "CorpusError",
    "AudioInputError",
    "RetimeError",
    "DesignError",
    "BuildError",
    "CheckInputError",
]
