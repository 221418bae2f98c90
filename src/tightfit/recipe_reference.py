"""The recipe reference (docs/recipe-reference.md), generated from the recipe dataclasses so it cannot drift.

    .venv/bin/python -m tightfit.recipe_reference > docs/recipe-reference.md

Keys of [data] and [train] and their defaults come from DataConfig / TrainConfig, their meaning from
each field's trailing comment; [space] and [[space.stage]] keys from tightfit.recipe.SPACE_KEYS and
STAGE_KEYS, the same tables the parser accepts. tests/test_recipe.py checks the committed file.
"""
from __future__ import annotations

import inspect
import re
from dataclasses import MISSING, fields

from tightfit.recipe import DataConfig, TrainConfig
from tightfit.recipe_tables import SPACE_KEYS, STAGE_KEYS

_FIELD = re.compile(r"^\s+(\w+):[^=#]+=[^#]*#\s*(.*)$")
_MORE = re.compile(r"^\s+#\s*(.*)$")


def field_notes(cls: type) -> dict[str, str]:
    """Trailing comment of each field of a config dataclass, continuation comment lines joined."""
    notes: dict[str, str] = {}
    last = None
    for line in inspect.getsource(cls).splitlines():
        if m := _FIELD.match(line):
            last = m.group(1)
            notes[last] = m.group(2).strip()
        elif last and (m := _MORE.match(line)) and line.index("#") > 20:
            notes[last] += " " + m.group(1).strip()
        else:
            last = None
    return notes


def _default(value: object) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    return f'"{value}"' if isinstance(value, str) else repr(value)


def _table(rows: list[tuple[str, str, str]]) -> list[str]:
    return ["| key | default | meaning |", "|---|---|---|", *[f"| `{k}` | `{d}` | {m} |" for k, d, m in rows], ""]


def _dataclass_rows(cls: type) -> list[tuple[str, str, str]]:
    notes = field_notes(cls)
    return [(f.name, _default(f.default) if f.default is not MISSING else "(required)", notes.get(f.name, ""))
            for f in fields(cls)]


def reference_markdown() -> str:
    lines = ["# Recipe reference", "",
             "Generated from the recipe dataclasses by `python -m tightfit.recipe_reference` (do not edit by hand). "
             "A recipe is a TOML file: `name` and `seed` at the top, then `[data]`, `[space]` with one or more "
             "`[[space.stage]]` tables, and `[train]`. Unknown keys are refused with the list of allowed ones. "
             "Examples: `recipes/*.toml`.", "",
             "## Top level", "",
             *_table([("name", "(the file's name)", "names the run in reports"),
                      ("seed", "0", "seeds data splits, augmentation, initialisation and subnet sampling")]),
             "## [data]", "", *_table(_dataclass_rows(DataConfig)),
             "## [space]", "", *_table([(k, d, m) for k, (d, m) in SPACE_KEYS.items()]),
             "## [[space.stage]]", "", *_table([(k, d, m) for k, (d, m) in STAGE_KEYS.items()]),
             "## [train]", "", *_table(_dataclass_rows(TrainConfig))]
    return "\n".join(lines)


if __name__ == "__main__":
    print(reference_markdown())
