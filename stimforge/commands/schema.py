"""`stimforge schema`: print the recipe's JSON Schema."""

from __future__ import annotations

import json


def add_parser(sub) -> None:
    p = sub.add_parser("schema", help="print the recipe JSON Schema (for editors)")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..recipe import recipe_json_schema

    print(json.dumps(recipe_json_schema(), indent=2))
    return 0
