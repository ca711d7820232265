"""The study's ``spark:`` section: Spark settings, the connect timeout, where stages are kept."""

from __future__ import annotations

from typing import Annotated, Literal, Self

from pydantic import Field, model_validator

from pipeline.config._base import Model

SparkValue = str | int | float | bool


class SparkSettings(Model):
    """How the Spark engine runs this study; read only with ``--engine spark``.

    ``settings`` are Spark settings (``spark.sql.shuffle.partitions: 200``); they beat the
    user's ``spark-defaults.conf`` and the tool's defaults, and ``--spark-conf`` beats them.
    ``stage_storage`` says where each table stage is kept: ``local_checkpoint`` (fast, but a
    lost executor fails the build), ``checkpoint`` (in ``checkpoint_folder``, a URI every
    machine of the cluster reaches) or ``cache`` (recomputed where an executor was lost).
    """

    settings: dict[Annotated[str, Field(pattern=r"^spark\.[A-Za-z0-9_.-]+$")], SparkValue] = Field(
        default_factory=dict
    )
    connect_timeout_seconds: Annotated[float, Field(gt=0, le=3600)] = 30.0
    stage_storage: Literal["local_checkpoint", "checkpoint", "cache"] = "local_checkpoint"
    checkpoint_folder: str | None = None

    @model_validator(mode="after")
    def _folder_with_checkpoints(self) -> Self:
        if (self.stage_storage == "checkpoint") != (self.checkpoint_folder is not None):
            raise ValueError(
                "checkpoint_folder goes with stage_storage: checkpoint (and only with it)"
            )
        return self

    def text_settings(self) -> dict[str, str]:
        """The settings as Spark takes them: text, booleans as ``true``/``false``."""
        return {
            key: str(value).lower() if isinstance(value, bool) else str(value)
            for key, value in self.settings.items()
        }
