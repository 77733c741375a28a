"""`stimforge rates RECIPE`: validate a recipe and print its rate table."""

from __future__ import annotations

from pathlib import Path


def add_parser(sub) -> None:
    p = sub.add_parser(
        "rates", help="validate a recipe and print its rate table",
        description="Validate a recipe, print its rate table and what a build of it would make "
        "and cost. Exit 0: valid; 2: invalid, or too large to build without --allow-large.")
    p.add_argument("recipe", type=Path)
    p.add_argument("--allow-large", action="store_true",
                   help="accept a set beyond the sane size limits, as `build --allow-large`")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..build import estimate_build
    from ..recipe import load_recipe

    recipe = load_recipe(args.recipe)
    # the corpus and the material are not read here: a "valid" would promise too much
    print(f"recipe {recipe.name}: the schema and the rates are valid (the corpus, the material "
          f"and the stretch factors are checked by `stimforge build {args.recipe} --dry-run`)")
    print(recipe.rates().format())
    size = estimate_build(recipe)
    print(f"a build makes: {size.format()}")
    size.refuse(allow_large=args.allow_large)  # the build's own refusal, before its work
    return 0
