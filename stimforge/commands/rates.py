"""`stimforge rates RECIPE`: validate a recipe and print its rate table."""

from __future__ import annotations

from pathlib import Path


def add_parser(sub) -> None:
    p = sub.add_parser("rates", help="validate a recipe and print its rate table")
    p.add_argument("recipe", type=Path)
    p.set_defaults(run=run)


def run(args) -> int:
    from ..recipe import load_recipe

    recipe = load_recipe(args.recipe)
    print(f"recipe {recipe.name}: valid")
    print(recipe.rates().format())
    return 0
