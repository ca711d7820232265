"""Small-cell suppression of many released tables as one linked system of counts.

Hiding a count in one table is useless if another table shows it or lets it be worked out
(53 events in the incidence table minus 50 shown in the dependence table gives back a Table 1
cell of 3). So every count released from one cohort is a *cell* of one system:

- **Cells.** A cell is a key naming the set of patients (or rows) it counts and its value. The
  same set in two tables has the same key, so it is shown or hidden everywhere at once.
- **Latent cells.** Counts that are never released but tie released ones together (e.g. the
  patients of each combination of outcome states and Table 1 level). They are unknowns to a
  reader, whatever their size.
- **Relations.** Linear identities ``sum(coefficient * cell) = 0`` between cells, e.g.
  ``part_1 + part_2 - total = 0``, collected from every table and across tables.

The rule, precisely (:func:`protect_cells`):

1. **Primary suppression.** A released cell with ``1 <= value < threshold`` is hidden.
2. **Zeros are shown** and are never hidden as complements: a zero discloses no individual.
3. **Subtraction.** Whenever a relation has exactly one unknown cell (hidden or latent) and it
   is a hidden released cell, its value follows by subtraction, so the smallest shown non-zero
   cell of that relation is hidden too (lowest ``priority`` first, then smallest value; ties
   by key). Repeated until no relation has a single hidden unknown.
4. **Exact audit.** For every hidden cell, its feasible integer range is computed with
   ``scipy.optimize.milp``: minimise and maximise it subject to every relation, the shown
   values, non-negativity and integrality (latent cells unknown, hidden markers giving no
   bound). The cell is safe when ``max - min >= threshold`` (an unbounded maximum is safe).
   A cell that is not safe gets a complement: among the shown non-zero cells of relations that
   touch it (first), then of relations that touch any unknown connected to it, the first one
   (ordered as in step 3) whose hiding makes the cell safe, or, if none does alone, the first
   one; then step 3 runs again and the audit continues. Hiding a cell only removes a
   constraint, so a cell found safe stays safe and is not solved again.

The loop ends: with every non-zero released cell of a connected part hidden, the true values
scaled by any factor still satisfy every relation, so every hidden cell is unbounded above.

What this guarantees: no hidden count can be narrowed to fewer than ``threshold`` + 1 values
by any reasoning that uses only the released numbers, the relations given here, and the fact
that counts are non-negative integers. It assumes the reader ignores what the marker says
("<5" means 1 to 4); intervals are judged without that bound, as the audit's criterion. It
does not cover outside knowledge, patient-level files, or statistics other than counts (those
derived from a hidden cell must be withheld by the caller; see ``linked`` helpers in the
callers).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence

import numpy as np
from scipy import sparse
from scipy.optimize import Bounds, LinearConstraint, linprog, milp

__all__ = ["Relation", "feasible_range", "protect_cells"]

Relation = tuple[tuple[str, int], ...]
"""A linear identity ``sum(coefficient * cell) = 0`` as (cell key, coefficient) pairs."""

_TRIES = 6  # complements tried one by one before falling back to the first; bounds the time


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
    index, constraints = _model(cell, values, relations, set(unknown))
    n = len(index)
    objective = np.zeros(n)
    objective[index[cell]] = 1.0
    ends = []
    for sign in (1.0, -1.0):
        result = milp(
            sign * objective,
            constraints=constraints,
            integrality=np.ones(n),
            bounds=Bounds(0, np.inf),
        )
        if sign < 0 and result.status != 0 and _unbounded(objective, constraints, n):
            ends.append(math.inf)
            continue
        if result.status != 0:
            raise RuntimeError(f"disclosure audit of {cell}: {result.message}")
        ends.append(round(sign * result.fun))
    return float(ends[0]), float(ends[1])


def _model(
    cell: str, values: Mapping[str, int], relations: Sequence[Relation], unknown: set[str]
) -> tuple[dict[str, int], list[LinearConstraint]]:
    """Variables (the unknowns linked to ``cell``) and equality constraints of the audit."""
    index = {key: i for i, key in enumerate(sorted(_component(cell, relations, unknown)))}
    rows, cols, data, rhs = [], [], [], []
    for relation in relations:
        if not any(key in index for key, _ in relation):
            continue
        constant = 0
        for key, coefficient in relation:
            if key in index:
                rows.append(len(rhs))
                cols.append(index[key])
                data.append(coefficient)
            else:
                constant -= coefficient * values[key]
        rhs.append(constant)
    matrix = sparse.csr_array((data, (rows, cols)), shape=(len(rhs), len(index)))
    return index, [LinearConstraint(matrix, rhs, rhs)] if rhs else []


def _reachable(
    cell: str,
    values: Mapping[str, int],
    relations: Sequence[Relation],
    unknown: set[str],
    interval: tuple[float, float],
) -> bool:
    """Whether some non-negative integer solution puts ``cell`` inside ``interval``."""
    index, constraints = _model(cell, values, relations, unknown)
    low, high = np.zeros(len(index)), np.full(len(index), np.inf)
    low[index[cell]], high[index[cell]] = interval
    result = milp(
        np.zeros(len(index)),
        constraints=constraints,
        integrality=np.ones(len(index)),
        bounds=Bounds(low, high),
    )
    return bool(result.status == 0)


def _unbounded(objective: np.ndarray, constraints: list[LinearConstraint], n: int) -> bool:
    """Whether the cell has no upper bound (HiGHS reports "infeasible or unbounded" for MIPs).

    The true values are feasible, and for rational data a feasible integer program whose linear
    relaxation is unbounded is unbounded too, so the relaxation decides.
    """
    if constraints:
        a = constraints[0].A
        result = linprog(-objective, A_eq=a, b_eq=constraints[0].lb, bounds=(0, None))
    else:
        result = linprog(-objective, bounds=(0, None))
    return bool(result.status == 3)


def _component(cell: str, relations: Sequence[Relation], unknown: set[str]) -> set[str]:
    """The unknown cells linked to ``cell`` through relations (shown cells are constants)."""
    by_cell: dict[str, list[int]] = {}
    for r, relation in enumerate(relations):
        for key, _ in relation:
            if key in unknown:
                by_cell.setdefault(key, []).append(r)
    seen, todo, used = {cell}, [cell], set()
    while todo:
        for r in by_cell.get(todo.pop(), ()):
            if r in used:
                continue
            used.add(r)
            for key, _ in relations[r]:
                if key in unknown and key not in seen:
                    seen.add(key)
                    todo.append(key)
    return seen


class _System:
    """The mutable state of :func:`protect_cells`: values, relations and what is hidden."""

    def __init__(
        self,
        values: Mapping[str, int],
        relations: Sequence[Relation],
        latent: frozenset[str],
        priority: Mapping[str, int],
        threshold: int,
    ) -> None:
        self.values, self.relations, self.latent = values, relations, latent
        self.priority, self.threshold = priority, threshold
        self.hidden = {k for k, v in values.items() if k not in latent and 1 <= v < threshold}
        self.touching: dict[str, list[int]] = {}
        for r, relation in enumerate(relations):
            for key, _ in relation:
                self.touching.setdefault(key, []).append(r)

    def unknown(self) -> set[str]:
        return self.hidden | self.latent

    def order(self, keys: Iterable[str]) -> list[str]:
        """Shown non-zero released cells among ``keys``, in the order complements are chosen."""
        shown = {
            k for k in keys if k not in self.hidden and k not in self.latent and self.values[k] > 0
        }
        return sorted(shown, key=lambda k: (self.priority.get(k, 0), self.values[k], k))

    def subtraction(self) -> None:
        changed = True
        while changed:
            changed = False
            for relation in self.relations:
                unknown = [k for k, _ in relation if k in self.hidden or k in self.latent]
                if len(unknown) != 1 or unknown[0] in self.latent:
                    continue
                candidates = self.order(k for k, _ in relation)
                if candidates:
                    self.hidden.add(candidates[0])
                    changed = True

    def safe(self, cell: str) -> bool:
        unknown = self.unknown()
        value, t = self.values[cell], self.threshold
        # Cheap first: the true values are feasible, so a feasible point t away from them
        # proves the range is wide enough; only otherwise is the exact range computed.
        if _reachable(cell, self.values, self.relations, unknown, (value + t, math.inf)):
            return True
        if value >= t and _reachable(cell, self.values, self.relations, unknown, (0, value - t)):
            return True
        low, high = feasible_range(cell, self.values, self.relations, unknown)
        return high - low >= t

    def candidates(self, cell: str) -> list[str]:
        near = self.order(k for r in self.touching.get(cell, ()) for k, _ in self.relations[r])
        linked = _component(cell, self.relations, self.unknown())
        far = self.order(
            k
            for u in sorted(linked)
            for r in self.touching.get(u, ())
            for k, _ in self.relations[r]
        )
        return near + [k for k in far if k not in near]

    def complement(self, cell: str) -> None:
        candidates = self.candidates(cell)
        if not candidates:
            raise RuntimeError(f"disclosure audit: nothing left to hide around {cell}")
        for candidate in candidates[:_TRIES]:
            self.hidden.add(candidate)
            if self.safe(cell):
                return
            self.hidden.discard(candidate)
        self.hidden.add(candidates[0])


def protect_cells(
    values: Mapping[str, int],
    relations: Sequence[Relation],
    threshold: int,
    *,
    latent: Iterable[str] = (),
    priority: Mapping[str, int] | None = None,
) -> frozenset[str]:
    """Choose the released cells to hide (see the module docstring for the exact rule).

    Args:
        values: Every cell's true value, latent ones included.
        relations: Identities between cells; each must hold for ``values``.
        threshold: Smallest count that may be shown.
        latent: Cells that are never released.
        priority: Per cell, how much readers need it (default 0): complements are chosen
            among the cells of lowest priority first, then by smallest value (e.g. the cohort
            size gets a high priority, so it is hidden only when nothing else helps).

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
    system = _System(values, relations, frozenset(latent), priority or {}, threshold)
    system.subtraction()
    safe: set[str] = set()
    while True:
        pending = sorted(system.hidden - safe, key=lambda k: (system.values[k], k))
        leak = next((k for k in pending if not _mark(system, k, safe)), None)
        if leak is None:
            return frozenset(system.hidden)
        system.complement(leak)
        system.subtraction()


def _mark(system: _System, cell: str, safe: set[str]) -> bool:
    if system.safe(cell):
        safe.add(cell)
        return True
    return False
