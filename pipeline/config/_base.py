"""Shared base of every config model and the small types they use."""

from __future__ import annotations

from functools import partial
from typing import Annotated

from pydantic import AfterValidator, BaseModel, ConfigDict, Field

from pipeline.codes import check_code

NonNegativeInt = Annotated[int, Field(ge=0)]
PositiveInt = Annotated[int, Field(ge=1)]
Name = Annotated[str, Field(pattern=r"^[a-z][a-z0-9_]*$", max_length=48)]
ICD9Code = Annotated[str, AfterValidator(partial(check_code, "ICD9"))]
ICD10Code = Annotated[str, AfterValidator(partial(check_code, "ICD10"))]
ATCCode = Annotated[str, AfterValidator(partial(check_code, "ATC"))]
Quantity = str | float


class Model(BaseModel):
    """Base of every config model: unknown keys are errors, values are immutable."""

    model_config = ConfigDict(extra="forbid", frozen=True)
