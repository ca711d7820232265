"""An engine without a database, for tests of a plan's shape and of the shared engine steps.

:class:`FakeEngine` runs a plan through :class:`pipeline.engine.base.Engine`'s own stage loop
(callbacks, reports, data checks, the result's engine name) but executes nothing: each stage
is recorded in order, and the relations its SQL reads (found in the sqlglot tree by
``relations_read``) must have been produced earlier in this run, by a source view or an
earlier stage. (A ``Plan`` already refuses a stage whose ``depends_on``, read from its tree,
names a relation made later; the fake checks the run itself, e.g. a stage list cut short.)
Outputs come back as empty tables; a check stage passes unless the test names it in
``failing_checks`` with the rows it should "find".
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

import pyarrow as pa
from sqlglot import exp

from pipeline.compile import SourceTable, Stage
from pipeline.compile._reads import relations_read
from pipeline.engine.base import Engine
from pipeline.errors import EngineError
from pipeline.extract import ExtractTable


@dataclass
class Ledger:
    """What a fake run did: relations produced, stages run in order."""

    produced: set[str] = field(default_factory=set)
    stages: list[str] = field(default_factory=list)


class FakeEngine(Engine[Ledger]):
    """Runs a plan's stages in order without a database; see the module docstring.

    Args:
        failing_checks: Check stage name -> the rows it returns (so the run fails there).
    """

    DIALECT = "fake"
    LABEL = "the fake engine"

    def __init__(self, failing_checks: dict[str, list[tuple[Any, ...]]] | None = None) -> None:
        self.failing_checks = dict(failing_checks or {})
        self.ledger = Ledger()

    @property
    def version(self) -> str:
        """No library: the fake's version is fixed."""
        return "0"

    @contextmanager
    def _open(self) -> Iterator[Ledger]:
        self.ledger = Ledger()
        yield self.ledger

    def _bind(
        self,
        conn: Ledger,
        sources: tuple[SourceTable, ...],
        tables: dict[str, ExtractTable],
        patients: tuple[str, ...] | None = None,
    ) -> None:
        # No files: every source view simply exists.
        conn.produced.update(source.relation for source in sources)

    def _table_rows(
        self, conn: Ledger, table: ExtractTable, source: SourceTable | None = None
    ) -> exp.Expression:
        return exp.to_table(f"{table.name}_files")

    def _column_type(self, conn: Ledger, table: ExtractTable, column: exp.Expression) -> str:
        return self.TEXT_TYPE

    def _create_view(self, conn: Ledger, name: str, query: exp.Query) -> None:
        conn.produced.add(name)

    def _reads(self, conn: Ledger, stage: Stage) -> None:
        """Refuse a stage reading what this run has not produced yet."""
        missing = sorted(set(relations_read(stage.query)) - conn.produced)
        if missing:
            raise EngineError(
                f"reads {', '.join(missing)}, not produced earlier",
                code="stage-input-missing",
                where=f"stage {stage.name}",
            )
        conn.stages.append(stage.name)

    def _materialise(self, conn: Ledger, stage: Stage) -> tuple[int | None, int | None]:
        self._reads(conn, stage)
        conn.produced.add(stage.name)
        return (None if stage.kind == "view" else 0), None

    def _first_rows(self, conn: Ledger, query: exp.Query, limit: int | None) -> list[Any]:
        return []  # no data

    def _check_rows(self, conn: Ledger, stage: Stage) -> list[Any]:
        self._reads(conn, stage)
        rows = self.failing_checks.get(stage.name, [])
        return rows[: self.CHECK_ROWS_SHOWN] if self.CHECK_ROWS_SHOWN else rows

    def _fetch(
        self, conn: Ledger, stage_name: str, order: Sequence[str], rows: int | None
    ) -> pa.Table:
        if stage_name not in conn.produced:
            raise EngineError(f"output {stage_name} was never produced", code="output-missing")
        return pa.table({})

    def _is_own_error(self, err: BaseException) -> bool:
        return False
