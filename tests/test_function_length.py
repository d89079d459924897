"""No function outside the tests is longer than 80 lines, unless it is listed below with the reason.

Length is what Python's ``ast`` records: ``end_lineno - lineno + 1``, the ``def`` line to the last line, docstring
and nested functions included; methods and nested functions are measured too. A long function is split into
named steps; a function that reads better whole goes in ``ALLOWED`` with why (the list starts empty).
"""
from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
FOLDERS = ("inference", "models", "trainer", "benchmarks", "console", "configs")
LIMIT = 80

# "folder/module.py:function" -> the reason it stays longer than LIMIT lines.
ALLOWED: dict[str, str] = {}


def _lengths() -> dict[str, int]:
    lengths = {}
    for folder in FOLDERS:
        for path in sorted((ROOT / folder).rglob("*.py")):
            for node in ast.walk(ast.parse(path.read_text(), filename=str(path))):
                if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                    name = f"{path.relative_to(ROOT).as_posix()}:{node.name}"
                    lengths[name] = max(lengths.get(name, 0), node.end_lineno - node.lineno + 1)
    return lengths


def test_no_function_over_the_limit_unless_listed_with_a_reason():
    lengths = _lengths()
    assert lengths, "no functions found: the folders moved?"
    long = {name: lines for name, lines in lengths.items() if lines > LIMIT}
    unlisted = {name: lines for name, lines in long.items() if name not in ALLOWED}
    assert not unlisted, (f"functions over {LIMIT} lines (split them into named steps, or list them in ALLOWED "
                          f"with the reason): {dict(sorted(unlisted.items(), key=lambda item: -item[1]))}")
    assert all(reason.strip() for reason in ALLOWED.values()), "every allowed long function needs its reason"
    stale = set(ALLOWED) - set(long)
    assert not stale, f"listed functions no longer over {LIMIT} lines (or gone): remove them from ALLOWED: {stale}"
