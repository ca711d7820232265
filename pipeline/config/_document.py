"""Validate a located YAML document against a config model, errors at file:line:col."""

from __future__ import annotations

import difflib
from collections.abc import Iterable
from typing import Any, TypeVar

from pydantic import BaseModel, ValidationError

from pipeline.config._base import Model
from pipeline.config._measure import MEASURES_CONTEXT
from pipeline.config._yaml import LocatedDocument, PathKey
from pipeline.errors import ConfigError, Problem
from pipeline.measures import MeasureRegistry

M = TypeVar("M", bound=BaseModel)


def _vocabulary() -> list[str]:
    """Every key our config models accept, for 'did you mean' suggestions."""
    names: set[str] = set()
    pending: list[type[BaseModel]] = [Model]
    while pending:
        model = pending.pop()
        names.update(model.model_fields)
        pending.extend(model.__subclasses__())
    return sorted(names)


def did_you_mean(word: str, choices: Iterable[str]) -> str:
    """Return ``"; did you mean 'x'?"`` for the closest choice, or an empty string."""
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f"; did you mean '{close[0]}'?" if close else ""


def _dotted(path: PathKey) -> str:
    text = ""
    for part in path:
        text += f"[{part}]" if isinstance(part, int) else (f".{part}" if text else part)
    return text or "(top level)"


def _problem_from_error(doc: LocatedDocument, error: Any, vocabulary: list[str]) -> Problem:
    loc: PathKey = tuple(error["loc"])
    kind = error["type"]
    if kind == "extra_forbidden":
        key = str(loc[-1])
        return doc.problem(
            loc, "unknown-key", f"unknown key '{key}'{did_you_mean(key, vocabulary)}"
        )
    if kind == "missing":
        return doc.problem(
            loc[:-1], "missing-key", f"'{loc[-1]}' is required in {_dotted(loc[:-1])}"
        )
    message = str(error["msg"]).removeprefix("Value error, ")
    if kind in ("greater_than_equal", "greater_than"):
        message = f"must be {error['ctx'].get('ge', error['ctx'].get('gt'))} or more"
        message += f" (got {error['input']!r})"
    at_value = doc.holds_scalar(loc)
    return doc.problem(loc, "bad-value", f"{_dotted(loc)}: {message}", at_value=at_value)


def validate_document(
    doc: LocatedDocument, model: type[M], measures: MeasureRegistry | None = None
) -> M:
    """Validate a located document against a model, mapping errors to file:line:col.

    Args:
        doc: The document.
        model: The model to validate it against.
        measures: The measures thresholds and covariates may name (default: the shipped ones).

    Raises:
        ConfigError: With one problem per validation error.
    """
    if not isinstance(doc.data, dict):
        raise ConfigError([doc.problem((), "bad-value", "the file must hold a mapping of keys")])
    context = {MEASURES_CONTEXT: measures} if measures is not None else None
    try:
        return model.model_validate(doc.data, context=context)
    except ValidationError as err:
        vocabulary = _vocabulary()
        raise ConfigError([_problem_from_error(doc, e, vocabulary) for e in err.errors()]) from err
