"""The plan as the passes build it: the stages so far, looked up by name.

Each pass takes the draft and returns it with its own stages added. A later pass asks the
draft whether an earlier stage exists (``has``) instead of rebuilding that stage to find out,
so every stage is built once and a pass depends on what was built, not on how.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from pipeline.compile._context import CompileContext
from pipeline.compile._plan import Stage


@dataclass(frozen=True)
class Draft:
    """A study's context and the stages compiled so far, in order.

    Attributes:
        ctx: What every pass needs to know about the study.
        stages: The stages added by earlier passes.
    """

    ctx: CompileContext
    stages: tuple[Stage, ...] = ()

    def has(self, name: str) -> bool:
        """Whether an earlier pass added a stage called ``name``."""
        return any(stage.name == name for stage in self.stages)

    def stage(self, name: str) -> Stage:
        """The earlier stage called ``name``.

        Raises:
            KeyError: No earlier pass added it.
        """
        for stage in self.stages:
            if stage.name == name:
                return stage
        raise KeyError(name)

    def add(self, *stages: Stage | None) -> Draft:
        """The draft with ``stages`` appended (``None``: a stage the study does not need)."""
        return Draft(self.ctx, self.stages + tuple(s for s in stages if s is not None))


Pass = Callable[[Draft], Draft]


def adding(build: Callable[[CompileContext], tuple[Stage, ...]]) -> Pass:
    """A pass from a function that needs only the study to build its stages."""

    def run(draft: Draft) -> Draft:
        return draft.add(*build(draft.ctx))

    run.__name__ = build.__name__
    run.__doc__ = build.__doc__
    return run
