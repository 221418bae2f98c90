"""The code passes ruff with the rules configured in pyproject.toml ([tool.ruff]).

The rules are ruff's ports of pycodestyle (PEP 8), pyflakes and flake8-bugbear, kept by their
community; this test only runs them, so a finding fails the suite where it was introduced.
"""
from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def ruff_command() -> list[str]:
    """ruff from the environment's package, else from PATH; skip when neither is installed."""
    try:
        from ruff.__main__ import find_ruff_bin
        return [str(find_ruff_bin())]
    except (ImportError, FileNotFoundError):
        found = shutil.which("ruff")
        if found is None:
            pytest.skip("ruff is not installed (pip install -e '.[test]' installs it)")
        return [found]


def test_ruff_finds_nothing_in_src_tests_scripts():
    proc = subprocess.run([*ruff_command(), "check", "--no-cache", "--output-format", "concise",
                           "src", "tests", "scripts"], cwd=ROOT, capture_output=True, text=True)
    assert proc.returncode == 0, f"ruff check found problems:\n{proc.stdout}{proc.stderr}"


def test_ruff_reads_the_project_rules():
    """The configuration is in force: pyflakes' unused import (F401) and pycodestyle's long line (E501,
    over the 140 set in pyproject.toml) are reported; a 140-character line is not."""
    def check(text: str) -> str:
        return subprocess.run([*ruff_command(), "check", "--no-cache", "--output-format", "concise",
                               "--stdin-filename", "tests/example.py", "-"],
                              cwd=ROOT, input=text, capture_output=True, text=True).stdout
    assert "F401" in check("import os\n")
    assert "E501" in check("x = '" + "a" * 135 + "'\n") and "E501" not in check("x = '" + "a" * 134 + "'\n")
