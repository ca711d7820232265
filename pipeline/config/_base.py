"""Shared base of every config model and the small types they use."""

from __future__ import annotations

from functools import partial
from typing import Annotated

from pydantic import AfterValidator, BaseModel, BeforeValidator, ConfigDict, Field

from pipeline.codes import check_code

NonNegativeInt = Annotated[int, Field(ge=0)]
PositiveInt = Annotated[int, Field(ge=1)]
Name = Annotated[str, Field(pattern=r"^[a-z][a-z0-9_]*$", max_length=48)]


def _code_text(value: object) -> object:
    """Refuse a code YAML read as a number: ``428.10`` would silently become ``428.1``."""
    if isinstance(value, int | float) and not isinstance(value, bool):
        raise ValueError(
            f'the code {value} was read as a number; put codes in quotes, e.g. ["{value}"], '
            "so they are read exactly as written"
        )
    return value


def _listed(value: object) -> object:
    """A single value where a list is expected is a list of one (``atc: M04AA01``)."""
    if isinstance(value, str | int | float) and not isinstance(value, bool):
        return (value,)
    return value


# Annotated[tuple[X, ...], ONE_OR_MORE]: a list, or one value standing for a list of one.
ONE_OR_MORE = BeforeValidator(_listed)
ICD9Code = Annotated[str, BeforeValidator(_code_text), AfterValidator(partial(check_code, "ICD9"))]
ICD10Code = Annotated[
    str, BeforeValidator(_code_text), AfterValidator(partial(check_code, "ICD10"))
]
ATCCode = Annotated[str, BeforeValidator(_code_text), AfterValidator(partial(check_code, "ATC"))]
Quantity = str | float


class Model(BaseModel):
    """Base of every config model: unknown keys are errors, values are immutable."""

    model_config = ConfigDict(extra="forbid", frozen=True)
