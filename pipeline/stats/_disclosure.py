"""Small-cell suppression of many released tables as one linked system of counts.

Hiding a count in one table is useless if another table shows it or lets it be worked out
(53 events in the incidence table minus 50 shown in the dependence table gives back a Table 1
cell of 3). So every count released from one cohort is a *cell* of one system:

- **Cells.** A cell is a key naming the set of patients (or rows) it counts and its value. The
  same set in two tables has the same key, so it is shown or hidden everywhere at once.
- **Latent cells.** Counts that are never released but tie released ones together (e.g. the
  patients of each combination of outcome states and Table 1 level). They are unknowns to a
  reader, whatever their size.
- **Known cells.** Counts a reader is taken to know although they are not printed (e.g. the
  rows read of a source table). They are never hidden: hiding them would protect nothing.
- **Relations.** Linear identities ``sum(coefficient * cell) = 0`` between cells, e.g.
  ``part_1 + part_2 - total = 0``, collected from every table and across tables.

The rule, precisely (:func:`protect_cells`):

1. **Primary suppression.** A released cell with ``1 <= value < threshold`` is hidden.
2. **Zeros are shown** and are never hidden as complements: a zero discloses no individual.
3. **Safe.** A hidden cell is *safe* when its feasible integer range, given every shown cell,
   the relations, non-negativity and integrality (latent and hidden cells unknown, the hidden
   markers giving no bound), satisfies ``max - min >= threshold`` (an unbounded maximum is
   safe). Each hidden cell is proved safe once; hiding more only removes constraints, so a
   proof stays valid.
4. **Proof by a witness.** The true values are one solution. A second integer solution, equal
   on every shown cell and moving the cell by at least ``threshold``, proves it safe, and proves
   at once every other hidden cell it moves that far.
5. **Complements by optimisation.** For a hidden cell not yet proved, an integer program looks
   for the cheapest such second solution that may also move shown non-zero cells (never a
   zero, never a known cell), moving the cell up by ``threshold`` (and, for a cell of at least
   ``threshold``, down by it); the cells it moves are hidden. The cost of moving a shown cell
   by one is its weight, ``1000 ** priority * (1 + value / (1 + value))``: fewest cells first,
   a cell of one priority higher only when it saves a thousand cells, and among equals the
   smaller count. Zero cost means the cell is safe already. Otherwise its exact range is
   computed (step 3), since a range such as ``[v - 2, v + 3]`` is safe although no single
   move of ``threshold`` exists; if it is too narrow, the cheaper move's cells are hidden (the
   upward one on a tie). Hidden cells are treated in order of value, then key. A cell that no
   move can shift even with every shown cell hidden is pinned by known cells alone (the only
   line of a quality table whose rows read are known); it stays hidden and nothing else is.

Every mixed-integer problem is solved with ``scipy.optimize.milp`` (HiGHS) on a sparse matrix
restricted to the cell's connected part of the system; a linear relaxation
(``scipy.optimize.linprog``) comes first: its range contains the integer range, so a
relaxed problem without a solution has no integer one, and an integral relaxed optimum is the
integer optimum (sums of parts usually give one). Relations are put in a canonical order, so
the hidden set does not depend on the order the caller lists them in.

What this guarantees: no hidden count can be narrowed to fewer than ``threshold`` + 1 values
by any reasoning that uses only the released numbers, the relations given here, and the fact
that counts are non-negative integers. It assumes the reader ignores what the marker says
("<5" means 1 to 4); intervals are judged without that bound, as the audit's criterion. It
does not cover outside knowledge, patient-level files, or statistics other than counts (those
derived from a hidden cell must be withheld by the caller; see ``linked`` helpers in the
callers), nor a cell pinned by known cells alone (step 5), which no suppression can protect.
The complements are a good choice, not a proven cheapest one: each cell is protected in turn
at the least cost, and an earlier choice is not revisited.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.optimize import Bounds, LinearConstraint, linprog, milp
from scipy.sparse.csgraph import connected_components

__all__ = ["Relation", "feasible_range", "protect_cells"]

Relation = tuple[tuple[str, int], ...]
"""A linear identity ``sum(coefficient * cell) = 0`` as (cell key, coefficient) pairs."""

_PRIORITY_BASE = 1000.0  # a cell of one priority higher costs as much as this many cells
_TOLERANCE = 1e-6


@dataclass(frozen=True)
class _Move:
    """A second integer solution: its cost and how far each cell moves (non-zero only)."""

    cost: float
    moves: dict[int, int]


class _System:
    """Every cell and relation as one sparse matrix, and the cells hidden so far.

    Columns are cells in sorted key order, rows are relations; the connected parts (cells
    linked through relations) are found once, and every solve is restricted to one part.
    """

    def __init__(
        self,
        values: Mapping[str, int],
        relations: Sequence[Relation],
        threshold: int,
        latent: frozenset[str],
        known: frozenset[str],
        priority: Mapping[str, int],
    ) -> None:
        self.keys = sorted(values)
        self.index = {k: i for i, k in enumerate(self.keys)}
        self.values = np.array([values[k] for k in self.keys], dtype=np.float64)
        self.threshold = threshold
        rows, cols, data = [], [], []
        relations = sorted({tuple(sorted(relation)) for relation in relations})
        for r, relation in enumerate(relations):
            for key, coefficient in relation:
                rows.append(r)
                cols.append(self.index[key])
                data.append(coefficient)
        n = len(self.keys)
        self.matrix = sparse.csc_array(
            (np.array(data, dtype=np.float64), (rows, cols)), shape=(len(relations), n)
        )
        graph = sparse.bmat([[None, self.matrix], [self.matrix.T, None]])
        _, labels = connected_components(graph, directed=False)
        self.part = labels[len(relations) :]
        self.latent = np.array([k in latent for k in self.keys])
        self.fixed = np.array([k in known for k in self.keys]) | (self.values == 0)
        self.hidden = ~self.latent & (self.values >= 1) & (self.values < threshold)
        self.hidden &= ~self.fixed
        rank = np.array([priority.get(k, 0) for k in self.keys], dtype=np.float64)
        self.weight = _PRIORITY_BASE**rank * (1 + self.values / (1 + self.values))
        self._parts: dict[int, tuple[np.ndarray, sparse.csc_array]] = {}

    def restricted(self, cell: int) -> tuple[np.ndarray, sparse.csc_array]:
        """The cells of ``cell``'s connected part and the relations among them."""
        part = int(self.part[cell])
        if part not in self._parts:
            cells = np.flatnonzero(self.part == part)
            sub = self.matrix[:, cells].tocsr()
            used = np.flatnonzero(np.diff(sub.indptr))
            self._parts[part] = (cells, sparse.csc_array(sub[used]))
        return self._parts[part]

    def move(self, cell: int, sign: int) -> _Move | None:
        """The cheapest integer solution moving ``cell`` by ``sign * threshold`` (or None).

        Unknown cells (hidden, latent) move freely at no cost; shown non-zero cells that may be
        hidden move at their weight per unit (split into an upward and a downward part); known
        and zero cells stay. All cells stay non-negative.
        """
        cells, a = self.restricted(cell)
        unknown = self.hidden[cells] | self.latent[cells]
        movable = ~unknown & ~self.fixed[cells]
        free, paid = cells[unknown], cells[movable]
        v = self.values
        paid_columns = a[:, np.flatnonzero(movable)]
        # columns: the unknown cells' moves, then the paid cells' upward and downward parts
        matrix = sparse.hstack([a[:, np.flatnonzero(unknown)], paid_columns, -paid_columns])
        low = np.concatenate([-v[free], np.zeros(2 * len(paid))])
        high = np.concatenate([np.full(len(free), np.inf), np.full(len(paid), np.inf), v[paid]])
        at = int(np.flatnonzero(free == cell)[0])
        t = self.threshold
        if sign > 0:
            low[at] = t
        else:
            high[at] = -t
        cost = np.concatenate([np.zeros(len(free)), self.weight[paid], self.weight[paid]])
        x = _solve(cost, matrix, low, high)
        if x is None:
            return None
        up, down = np.split(x[len(free) :], 2)
        steps = np.concatenate([x[: len(free)], up - down]).astype(np.int64)
        moved = np.concatenate([free, paid])
        moves = {int(i): int(s) for i, s in zip(moved, steps, strict=True) if s}
        return _Move(float(cost @ x), moves)

    def range_of(self, cell: int) -> tuple[float, float]:
        """Exact integer range of ``cell`` with the current hidden cells (see step 3)."""
        cells, a = self.restricted(cell)
        unknown = self.hidden[cells] | self.latent[cells]
        columns = np.flatnonzero(unknown)
        shown = np.flatnonzero(~unknown)
        rhs = -(a[:, shown] @ self.values[cells[shown]])
        at = int(np.flatnonzero(cells[columns] == cell)[0])
        return _integer_range(a[:, columns].tocsr(), rhs, at)


def _solve(
    cost: np.ndarray, matrix: sparse.csr_array, low: np.ndarray, high: np.ndarray
) -> np.ndarray | None:
    """Minimise ``cost @ x`` over integers with ``matrix @ x = 0`` and bounds; None if none."""
    rows = matrix.shape[0] > 0
    relaxed = linprog(
        cost,
        A_eq=matrix if rows else None,
        b_eq=np.zeros(matrix.shape[0]) if rows else None,
        bounds=np.column_stack([low, high]),
    )
    if relaxed.status == 2:  # the relaxation is infeasible, so is the integer program
        return None
    if relaxed.status == 0 and np.allclose(relaxed.x, np.round(relaxed.x), atol=_TOLERANCE):
        return np.round(relaxed.x)
    result = milp(
        cost,
        constraints=[LinearConstraint(matrix, 0, 0)] if rows else [],
        integrality=np.ones(len(cost)),
        bounds=Bounds(low, high),
    )
    if result.status == 0:
        return np.round(result.x)
    if result.status == 2:
        return None
    raise RuntimeError(f"disclosure: the solver failed: {result.message}")


def _integer_range(matrix: sparse.csr_array, rhs: np.ndarray, at: int) -> tuple[float, float]:
    """Exact integer (min, max) of variable ``at`` with ``matrix @ x = rhs``, ``x >= 0``."""
    n = matrix.shape[1]
    objective = np.zeros(n)
    objective[at] = 1.0
    ends = []
    rows = matrix.shape[0] > 0
    for sign in (1.0, -1.0):
        relaxed = linprog(
            sign * objective,
            A_eq=matrix if rows else None,
            b_eq=rhs if rows else None,
            bounds=(0, None),
        )
        if relaxed.status == 3:  # unbounded relaxation: unbounded integer program too
            ends.append(math.inf)  # (rational data, a feasible integer point: the true values)
            continue
        if relaxed.status != 0:
            raise RuntimeError(f"disclosure: the solver failed: {relaxed.message}")
        if np.allclose(relaxed.x, np.round(relaxed.x), atol=_TOLERANCE):
            ends.append(round(relaxed.x[at]))
            continue
        result = milp(
            sign * objective,
            constraints=[LinearConstraint(matrix, rhs, rhs)] if rows else [],
            integrality=np.ones(n),
            bounds=Bounds(0, np.inf),
        )
        if result.status != 0:
            raise RuntimeError(f"disclosure: the solver failed: {result.message}")
        ends.append(round(sign * result.fun))
    return float(ends[0]), float(ends[1])


def feasible_range(
    cell: str,
    values: Mapping[str, int],
    relations: Sequence[Relation],
    unknown: Iterable[str],
) -> tuple[float, float]:
    """Exact integer range of ``cell`` when the ``unknown`` cells are not known.

    Args:
        cell: An unknown cell.
        values: Every cell's true value (only those of known cells are used).
        relations: Identities between cells.
        unknown: Cells a reader does not see (hidden and latent ones).

    Returns:
        ``(min, max)``; ``max`` is ``math.inf`` when the cell is unbounded.

    Raises:
        RuntimeError: If the solver fails (the true values are always feasible).
    """
    system = _System(values, relations, 1, frozenset(unknown), frozenset(), {})
    system.hidden[:] = False
    return system.range_of(system.index[cell])


def hidden_marker(value: int, threshold: int) -> str:
    """How a hidden count reads: ``<threshold`` when it is small, else ``*``.

    Every suppressed output (the report, ``summary/*.csv``, ``validate``'s text, the release
    copy of the code audit) marks hidden counts with this one function.

    A count hidden only so that a small one cannot be worked out by subtraction is larger than
    the threshold; showing it as ``<5`` would misstate it.
    """
    return f"<{threshold}" if 0 < value < threshold else "*"


def shown(value: int, key: str, hidden: frozenset[str], threshold: int) -> str:
    """A count as published: the number, or its hidden marker."""
    return hidden_marker(value, threshold) if key in hidden else str(value)


def protect_cells(
    values: Mapping[str, int],
    relations: Sequence[Relation],
    threshold: int,
    *,
    latent: Iterable[str] = (),
    known: Iterable[str] = (),
    priority: Mapping[str, int] | None = None,
) -> frozenset[str]:
    """Choose the released cells to hide (see the module docstring for the exact rule).

    Args:
        values: Every cell's true value, latent ones included.
        relations: Identities between cells; each must hold for ``values``.
        threshold: Smallest count that may be shown.
        latent: Cells that are never released.
        known: Cells a reader knows although they are not printed; never hidden.
        priority: Per cell, how much readers need it (default 0): a cell of priority ``p``
            costs as much as 1000 cells of priority ``p - 1`` (e.g. the cohort size gets a
            high priority, so it is hidden only when nothing else helps).

    Returns:
        The released cells to hide.

    Raises:
        ValueError: If the threshold is below 1, a count is negative, a relation names an
            unknown cell or does not hold for ``values``.
    """
    if isinstance(threshold, bool) or int(threshold) != threshold or threshold < 1:
        raise ValueError(f"threshold must be a positive integer, got {threshold!r}")
    if any(v < 0 for v in values.values()):
        raise ValueError("protect_cells: counts must be non-negative")
    for relation in relations:
        missing = [k for k, _ in relation if k not in values]
        if missing:
            raise ValueError(f"protect_cells: relation names unknown cell(s) {missing}")
        if sum(c * values[k] for k, c in relation):
            raise ValueError(f"protect_cells: relation {relation} does not hold for the counts")
    system = _System(
        values, relations, threshold, frozenset(latent), frozenset(known), priority or {}
    )
    proved = np.zeros(len(system.keys), dtype=bool)
    while len(pending := np.flatnonzero(system.hidden & ~proved)):
        cell = int(min(pending, key=lambda i: (system.values[i], system.keys[i])))
        _protect(system, cell, proved)
    return frozenset(system.keys[i] for i in np.flatnonzero(system.hidden))


def _protect(system: _System, cell: int, proved: np.ndarray) -> None:
    """Prove ``cell`` safe, hiding the complements of the cheapest move if needed (steps 4-5).

    Marks as proved the cell and every hidden cell the chosen move shifts by at least the
    threshold. A cell that no move can shift, even with every shown cell hidden, is pinned by
    known cells alone; hiding more cannot help, so it stays hidden as it is.
    """
    t = system.threshold
    signs = (1, -1) if system.values[cell] >= t else (1,)
    options = [m for sign in signs if (m := system.move(cell, sign)) is not None]
    best = min(options, key=lambda m: m.cost, default=None)
    proved[cell] = True
    if best is None or best.cost > _TOLERANCE:
        low, high = system.range_of(cell)
        if best is None or high - low >= t:
            return
        for i in best.moves:
            if not (system.latent[i] or system.fixed[i]):
                system.hidden[i] = True
    for i, step in best.moves.items():
        if abs(step) >= t:
            proved[i] = True
