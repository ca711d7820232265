"""Every extract and engine error the package raises carries a stable code.

A user (or a script) tells failures apart by the code in ``where [code] message``, so an
``ExtractError`` or ``EngineError`` raised without one would print a bare sentence. This reads
the package's source trees and fails on such a raise.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pipeline
from pipeline.errors import EngineError, ExtractError

PACKAGE = Path(pipeline.__file__).parent


def _uncoded() -> list[str]:
    found = []
    for path in sorted(PACKAGE.rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if (
                isinstance(node, ast.Call)
                and isinstance(node.func, ast.Name)
                and node.func.id in ("ExtractError", "EngineError")
                and not any(k.arg == "code" for k in node.keywords)
            ):
                found.append(f"{path.relative_to(PACKAGE)}:{node.lineno}")
    return found


def test_every_extract_and_engine_error_has_a_code() -> None:
    assert _uncoded() == []


def test_the_code_and_place_lead_the_message() -> None:
    err = EngineError("row accounting failed", code="row-accounting-failed", where="stage x")
    assert (err.code, err.where) == ("row-accounting-failed", "stage x")
    assert str(err) == "stage x [row-accounting-failed] row accounting failed"
    assert ExtractError("no table").code == "extract-unusable"  # the class's default
