"""Small-cell suppression for published summary tables.

Counts of 1 to ``threshold - 1`` patients can identify people, so no published table shows
them. The raw cohort file is the only unsuppressed output; every table in the report and every
exported CSV goes through :func:`suppress_counts`.

The rule, precisely:

1. **Cells.** The cells are the values of ``count_columns`` and of ``total_column`` (if given)
   in every row. Null cells are not counts and are left as null.
2. **Primary suppression.** A cell with ``1 <= count < threshold`` is replaced by
   ``f"<{threshold}"``.
3. **Zeros are shown.** A true zero is shown as ``0``. We chose this because a zero discloses
   no individual, and hiding zeros would make most sparse tables unreadable. (A zero may still
   be hidden as a complement, step 5, when it is the only cell left to protect another.)
4. **Relations.** A *relation* is a set of cells whose sum a reader knows or can work out:

   - each row, when ``total_column`` is given: the row's count cells add up to its total,
     and the total is one of the relation's cells;
   - each column within each group of rows (all rows when ``group_by`` is empty), when
     ``column_totals`` is true (the default): we assume the column total is published or
     derivable elsewhere (e.g. the number of patients), so it is treated as known even if the
     table has no totals row.

   A relation with fewer than two cells is ignored (its only cell *is* the total).
5. **Secondary suppression.** Whenever a relation has exactly one hidden cell, that cell could
   be recovered by subtraction, so the smallest remaining shown non-zero cell of the relation
   is hidden too (ties: first in row, then column order; a zero only if no non-zero cell is
   left), and shown as ``secondary_marker``. This repeats over all relations until none has
   exactly one hidden cell.

6. **Linear audit.** Subtraction can also work through a combination of relations (two blocks
   of hidden cells joined by a single hidden cell). After step 5, every hidden cell whose value
   is fixed by the relations (its row of the null space of the relations restricted to hidden
   cells is zero) gets the smallest shown cell of one of its relations hidden as well, and
   step 5 runs again, until no hidden cell is determined.

The result: no hidden cell can be recovered from the row and column totals by subtraction,
step by step or through any linear combination of them. What it does not cover is reasoning
with bounds (e.g. two hidden cells known to sum to 2 must both be 1, or a "*" cell known to be
0 or at least the threshold); tables where that matters need a dedicated tool such as
tau-ARGUS.

Secondary cells are marked differently from primary ones because they are usually large:
showing a hidden 120 as "<5" would misstate it. The report's footnote should say
"<5: fewer than 5 patients; *: hidden so that a smaller count cannot be worked out".
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import polars as pl
from numpy.typing import NDArray
from scipy import linalg

__all__ = ["suppress_counts"]

_SHOWN, _PRIMARY, _SECONDARY = 0, 1, 2


Cell = tuple[int, int]
Relation = list[tuple[Cell, int]]
"""A linear relation ``sum(coefficient * cell) = known constant`` as (cell, coefficient)."""


def _relations(
    table: pl.DataFrame,
    n_counts: int,
    *,
    row_totals: bool,
    column_totals: bool,
    group_by: Sequence[str],
) -> list[Relation]:
    n_cols = n_counts + int(row_totals)
    relations: list[Relation] = []
    if row_totals:  # counts minus the row total is 0
        relations.extend(
            [((i, j), 1) for j in range(n_counts)] + [((i, n_counts), -1)]
            for i in range(table.height)
        )
    if column_totals:
        if group_by:
            keyed = table.select(group_by).with_row_index("_row")
            groups = [
                g["_row"].to_list() for g in keyed.partition_by(list(group_by), maintain_order=True)
            ]
        else:
            groups = [list(range(table.height))]
        relations.extend([((i, j), 1) for i in rows] for rows in groups for j in range(n_cols))
    return relations


def _hide_complement(
    values: NDArray[np.float64], status: NDArray[np.int8], cells: list[Cell]
) -> bool:
    """Hide the smallest shown cell among ``cells`` (non-zero first); False if none is left."""
    shown = [cell for cell in cells if status[cell] == _SHOWN and not np.isnan(values[cell])]
    if not shown:
        return False
    nonzero = [cell for cell in shown if values[cell] > 0]
    status[min(nonzero or shown, key=lambda cell: (values[cell], cell))] = _SECONDARY
    return True


def _protect(
    values: NDArray[np.float64], status: NDArray[np.int8], relations: list[Relation]
) -> None:
    """Apply secondary suppression in place until no relation has exactly one hidden cell."""
    changed = True
    while changed:
        changed = False
        for relation in relations:
            cells = [cell for cell, _ in relation if not np.isnan(values[cell])]
            if len(cells) < 2 or sum(status[cell] != _SHOWN for cell in cells) != 1:
                continue
            changed = _hide_complement(values, status, cells) or changed


def _determined(
    values: NDArray[np.float64], status: NDArray[np.int8], relations: list[Relation]
) -> list[Cell]:
    """Hidden cells whose value follows from some linear combination of the relations.

    A hidden cell is determined exactly when every solution of the relations (restricted to
    the hidden cells) moves it by zero, i.e. its row of the null-space basis is zero.
    """
    hidden = [(int(i), int(j)) for i, j in zip(*np.nonzero(status != _SHOWN), strict=True)]
    if not hidden:
        return []
    index = {cell: k for k, cell in enumerate(hidden)}
    matrix = np.zeros((max(len(relations), 1), len(hidden)))
    for r, relation in enumerate(relations):
        present = [(cell, c) for cell, c in relation if not np.isnan(values[cell])]
        if len(present) < 2:
            continue  # a one-cell "total" is the cell itself, not a separately known number
        for cell, coefficient in present:
            if cell in index:
                matrix[r, index[cell]] = coefficient
    basis = linalg.null_space(matrix)
    return [cell for cell in hidden if np.linalg.norm(basis[index[cell]]) < 1e-9]


def suppress_counts(
    table: pl.DataFrame,
    count_columns: Sequence[str],
    *,
    threshold: int = 5,
    total_column: str | None = None,
    group_by: Sequence[str] = (),
    column_totals: bool = True,
    linked_columns: Mapping[str, Sequence[str]] | None = None,
    secondary_marker: str = "*",
) -> pl.DataFrame:
    """Hide small counts, and any count that would let one be recovered by subtraction.

    See the module docstring for the exact rule.

    Args:
        table: The summary table; it is not modified.
        count_columns: Integer columns holding counts of patients.
        threshold: Smallest count that may be shown (counts ``1..threshold-1`` are hidden).
        total_column: Integer column holding each row's total of ``count_columns``; makes each
            row a relation.
        group_by: Columns whose values split the rows into blocks with separate column totals
            (e.g. ``["variable"]`` for a long Table 1: the levels of one variable add up).
        column_totals: Treat column totals (per block) as known; set false only for tables
            whose rows are not parts of a whole (e.g. one row per outcome).
        linked_columns: For a count column, columns derived from it (e.g. ``{"n":
            ["percent"]}``) that are set to null wherever the count is hidden, since they would
            reveal it.
        secondary_marker: Text shown for a count hidden only to protect another.

    Returns:
        A new table: count and total columns as strings (numbers, ``f"<{threshold}"`` or
        ``secondary_marker``), linked columns nulled where needed, other columns unchanged.

    Raises:
        ValueError: If a column is missing or not integer, a count is negative, or
            ``threshold`` is below 1.

    Examples:
        >>> t = pl.DataFrame({"group": ["a", "b", "c"], "n": [3, 40, 57]})
        >>> suppress_counts(t, ["n"])["n"].to_list()
        ['<5', '*', '57']
    """
    if isinstance(threshold, bool) or int(threshold) != threshold or threshold < 1:
        raise ValueError(f"threshold must be a positive integer, got {threshold!r}")
    cells = [*count_columns, *([total_column] if total_column else [])]
    linked = dict(linked_columns or {})
    needed = [*cells, *group_by, *(c for cols in linked.values() for c in cols), *linked]
    missing = [c for c in needed if c not in table.columns]
    if missing:
        raise ValueError(f"suppress_counts: column(s) {', '.join(missing)} not in the table")
    for column in cells:
        if not table.schema[column].is_integer():
            raise ValueError(f"suppress_counts: {column!r} is not an integer column")
    values = table.select(pl.col(c).cast(pl.Float64) for c in cells).to_numpy()
    values = values.reshape(table.height, len(cells))
    if np.any(values < 0):
        raise ValueError("suppress_counts: counts must be non-negative")
    status = np.where((values >= 1) & (values < threshold), _PRIMARY, _SHOWN).astype(np.int8)
    relations = _relations(
        table,
        len(count_columns),
        row_totals=total_column is not None,
        column_totals=column_totals,
        group_by=group_by,
    )
    _protect(values, status, relations)
    # Subtraction is now blocked; close the rarer leaks where a cell follows from a combination
    # of relations (e.g. two blocks of hidden cells joined by one cell).
    while leaks := _determined(values, status, relations):
        around = [c for rel in relations if any(c == leaks[0] for c, _ in rel) for c, _ in rel]
        if not _hide_complement(values, status, around):
            break
        _protect(values, status, relations)
    labels = {_PRIMARY: f"<{threshold}", _SECONDARY: secondary_marker}
    replaced: list[pl.Series] = []
    dependent_hidden: dict[str, NDArray[np.bool_]] = {}
    for j, column in enumerate(cells):
        text = [
            None if np.isnan(v) else labels.get(int(s), str(int(v)))
            for v, s in zip(values[:, j], status[:, j], strict=True)
        ]
        replaced.append(pl.Series(column, text, dtype=pl.String))
        for dep in linked.get(column, ()):
            mask = dependent_hidden.get(dep, np.zeros(table.height, dtype=np.bool_))
            dependent_hidden[dep] = mask | (status[:, j] != _SHOWN)
    for dep, mask in dependent_hidden.items():
        hidden = pl.Series(mask)
        replaced.append(
            pl.select(pl.when(hidden).then(None).otherwise(table[dep]).alias(dep)).to_series()
        )
    return table.with_columns(replaced)
