"""The mutation table of scripts/check_mutations.py stays aimed at the code: every mutation's text is
found exactly once in its file and every test it names exists, so moving code under the table fails
here, in seconds, rather than when the slow mutation run is next tried. No test is run and nothing is
mutated."""
from __future__ import annotations

import ast
import importlib.util
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _table():
    spec = importlib.util.spec_from_file_location("check_mutations", ROOT / "scripts" / "check_mutations.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up while the file runs
    spec.loader.exec_module(module)
    return module.MUTATIONS


MUTATIONS = _table()


def _test_names(path: Path) -> set[str]:
    return {n.name for n in ast.parse(path.read_text("utf-8")).body if isinstance(n, ast.FunctionDef)}


@pytest.mark.parametrize("m", MUTATIONS, ids=[m.what for m in MUTATIONS])
def test_each_mutation_text_is_found_exactly_once_in_its_file(m):
    # a text found twice would mutate the wrong place; found never, the mutation is skipped silently
    source = (ROOT / "src" / "tightfit" / m.file).read_text("utf-8")
    assert source.count(m.text) == 1, f"{m.file}: {m.what!r} found {source.count(m.text)} times"
    assert m.replacement != m.text


@pytest.mark.parametrize("m", MUTATIONS, ids=[m.what for m in MUTATIONS])
def test_each_mutation_names_tests_that_exist(m):
    # pytest node ids "file::function" (pytest documentation, "Specifying which tests to run")
    assert m.tests
    for node in m.tests:
        file, _, name = node.partition("::")
        assert (ROOT / file).is_file(), node
        assert name.split("[")[0] in _test_names(ROOT / file), node


def test_descriptions_are_unique():
    # the run prints one line per description: two alike could not be told apart
    whats = [m.what for m in MUTATIONS]
    assert len(whats) == len(set(whats))
