"""Where the definition library shipped with ascertain lives.

The repository keeps the library at its top level (``definitions/conditions`` and
``definitions/studies``); installation maps that folder to the subpackage ``pipeline.library``
(``[tool.setuptools.package-dir]`` in ``pyproject.toml``), so an installed tool finds its own
definitions wherever it was installed. A study names it with ``library: true`` instead of a
``definitions`` path, so the study still finds its definitions after it is copied elsewhere.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

from pipeline.errors import AscertainError

LIBRARY_PACKAGE = "pipeline.library"


def _installed() -> Path | None:
    """The installed ``pipeline.library`` folder (a wheel, or an editable install's mapping)."""
    try:
        spec = importlib.util.find_spec(LIBRARY_PACKAGE)
    except ModuleNotFoundError:
        return None
    if spec is None or not spec.submodule_search_locations:
        return None
    for location in spec.submodule_search_locations:
        folder = Path(location)
        if (folder / "conditions").is_dir():
            return folder
    return None


def _checkout() -> Path | None:
    """``definitions/`` beside the package, when the package is imported from a source checkout.

    Python finds ``pipeline`` in the current folder before any installed copy when the tests
    run from a clone (``python -m pytest``), and an editable install's finder maps only
    packages with an ``__init__.py``; in both cases ``library`` is not found as a subpackage,
    and the library is the checkout's own folder.
    """
    folder = Path(__file__).resolve().parents[2] / "definitions"
    return folder if (folder / "conditions").is_dir() else None


def library_folder() -> Path:
    """The shipped library: a folder holding ``conditions/`` and ``studies/``.

    Raises:
        AscertainError: Neither an installed library nor a source checkout's is found (a broken
            installation).
    """
    folder = _installed() or _checkout()
    if folder is None:
        raise AscertainError(
            "the definition library shipped with ascertain is not installed "
            f"(no package {LIBRARY_PACKAGE}); reinstall ascertain"
        )
    return folder


def library_conditions() -> Path:
    """The shipped condition definitions (``library: true`` in a study reads these)."""
    return library_folder() / "conditions"
