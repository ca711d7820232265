"""The public API is small, sorted and importable; no module grows past 500 lines."""

from __future__ import annotations

from pathlib import Path

import pipeline


def test_all_is_sorted_and_importable() -> None:
    assert pipeline.__all__ == sorted(pipeline.__all__)
    for name in pipeline.__all__:
        assert getattr(pipeline, name) is not None


def test_modules_stay_small() -> None:
    root = Path(pipeline.__file__).parent
    long = [
        (str(p.relative_to(root)), n)
        for p in root.rglob("*.py")
        if (n := len(p.read_text(encoding="utf-8").splitlines())) > 500
    ]
    assert long == []
