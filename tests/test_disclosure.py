"""The suppression core (:func:`pipeline.stats.protect_cells`) on small tables worked by hand.

Every check of a hidden cell's range here is this file's own: a dense integer program over all
cells with the shown ones fixed (``_exact_range``), or plain enumeration, never the core's
solver code.
"""

from __future__ import annotations

import math
import random
from itertools import product

import numpy as np
import pytest
from scipy import sparse
from scipy.optimize import Bounds, LinearConstraint, linprog, milp

from pipeline.stats import protect_cells
from pipeline.stats._disclosure import Relation, _solve, feasible_range

THRESHOLD = 5
CEILING = 100_000  # an upper bound on every cell: it can only narrow a range, never widen it


def _exact_range(
    values: dict[str, int], relations: list[Relation], hidden: set[str], cell: str
) -> float:
    """Width of ``cell``'s integer range, shown cells fixed, each cell in [0, CEILING]."""
    keys = sorted(values)
    index = {k: i for i, k in enumerate(keys)}
    matrix = np.zeros((len(relations), len(keys)))
    for r, relation in enumerate(relations):
        for k, c in relation:
            matrix[r, index[k]] += c
    low = np.array([0.0 if k in hidden else values[k] for k in keys])
    high = np.array([CEILING if k in hidden else values[k] for k in keys], dtype=np.float64)
    objective = np.zeros(len(keys))
    objective[index[cell]] = 1.0
    ends = []
    for sign in (1.0, -1.0):
        result = milp(
            sign * objective,
            constraints=LinearConstraint(matrix, 0, 0),
            integrality=np.ones(len(keys)),
            bounds=Bounds(low, high),
        )
        assert result.status == 0, result.message
        ends.append(sign * result.fun)
    return ends[1] - ends[0]


def _two_way(table: list[list[int]]) -> tuple[dict[str, int], list[Relation], dict[str, int]]:
    """Cells, row and column totals and the grand total of a table; margins get priority 1."""
    values = {f"c{i}{j}": v for i, row in enumerate(table) for j, v in enumerate(row)}
    columns = list(zip(*table, strict=True))
    values |= {f"r{i}": sum(row) for i, row in enumerate(table)}
    values |= {f"k{j}": sum(col) for j, col in enumerate(columns)} | {"all": sum(map(sum, table))}
    relations: list[Relation] = [
        (*((f"c{i}{j}", 1) for j in range(len(columns))), (f"r{i}", -1)) for i in range(len(table))
    ]
    relations += [
        (*((f"c{i}{j}", 1) for i in range(len(table))), (f"k{j}", -1)) for j in range(len(columns))
    ]
    relations.append((*((f"r{i}", 1) for i in range(len(table))), ("all", -1)))
    priority = {k: 1 for k in values if not k.startswith("c")}
    return values, relations, priority


def _random_table(seed: int) -> list[list[int]]:
    rng = np.random.default_rng(seed)
    rows, cols = int(rng.integers(2, 6)), int(rng.integers(2, 5))
    return rng.choice([0, 1, 2, 3, 4, 5, 7, 12, 30, 80], size=(rows, cols)).tolist()


@pytest.mark.parametrize("seed", range(30))
def test_random_tables_leave_every_hidden_cell_wide(seed: int) -> None:
    values, relations, priority = _two_way(_random_table(seed))
    hidden = protect_cells(values, relations, THRESHOLD, priority=priority)
    for key, value in values.items():
        if 1 <= value < THRESHOLD:
            assert key in hidden  # primary suppression
        if value == 0:
            assert key not in hidden  # zeros are shown, never complements
    for cell in hidden:
        assert _exact_range(values, relations, set(hidden), cell) >= THRESHOLD, cell


def test_the_range_check_breaks_primary_suppression_alone() -> None:
    # Guard against a vacuous check: hiding only the small cells leaves many of them narrow.
    broken = 0
    for seed in range(30):
        values, relations, _ = _two_way(_random_table(seed))
        primary = {k for k, v in values.items() if 1 <= v < THRESHOLD}
        broken += any(_exact_range(values, relations, primary, c) < THRESHOLD for c in primary)
    assert broken >= 10


def test_one_small_cell_is_protected_by_the_cheapest_rectangle() -> None:
    # By hand: with every margin published, a cell of a two-way table moves only along a cycle
    # of cells alternating +5 and -5 in rows and columns; the shortest is a rectangle of four
    # (common practice in disclosure control, from memory). The rectangle of the 2 with 6, 7
    # and 9 moves the smallest counts; no margin (priority 1) is needed.
    table = [[2, 6, 50, 80], [7, 9, 60, 90], [40, 70, 30, 30]]
    values, relations, priority = _two_way(table)
    hidden = protect_cells(values, relations, THRESHOLD, priority=priority)
    assert hidden == {"c00", "c01", "c10", "c11"}


def test_known_cells_are_never_hidden_and_the_smaller_complement_is_preferred() -> None:
    # Quality lines 3 + 40 + 57 = 100 rows read, which a reader knows. By hand: the 3 can move
    # up by 5 only if another line moves down by 5; the 40 and the 57 cost the same, the 40 is
    # the smaller count.
    values = {"a": 3, "b": 40, "c": 57, "read": 100}
    relations: list[Relation] = [(("a", 1), ("b", 1), ("c", 1), ("read", -1))]
    assert protect_cells(values, relations, THRESHOLD, known=["read"]) == {"a", "b"}
    # 3 + 0 = 3 rows read: the total is the only possible complement. Not known, it is hidden;
    # known, hiding it would protect nothing, so the 3 stays hidden alone (pinned).
    values = {"a": 3, "b": 0, "read": 3}
    relations = [(("a", 1), ("b", 1), ("read", -1))]
    assert protect_cells(values, relations, THRESHOLD) == {"a", "read"}
    assert protect_cells(values, relations, THRESHOLD, known=["read"]) == {"a"}


def test_a_hand_table_with_a_zero() -> None:
    # Sex F 3, M 97; smoker current 0, ex 40, never 60; both add up to 100 patients (known).
    # By hand: F is primary; only M can move against it. The zero is shown; smoker is untouched.
    values = {"F": 3, "M": 97, "current": 0, "ex": 40, "never": 60, "n": 100}
    relations: list[Relation] = [
        (("F", 1), ("M", 1), ("n", -1)),
        (("current", 1), ("ex", 1), ("never", 1), ("n", -1)),
    ]
    assert protect_cells(values, relations, THRESHOLD, known=["n"]) == {"F", "M"}


def test_cells_pinned_by_known_counts_stay_hidden_without_complements() -> None:
    # x 3 + y 4 + z 50 = 57 known. By hand: with z shown, x + y = 7, so x ranges over 0..7 and
    # y too: both are safe although neither can move up by 5 without z. A single line equal to
    # a known total cannot be protected by any hiding; it stays hidden, and nothing else is.
    values = {"x": 3, "y": 4, "z": 50, "t": 57, "only": 2, "read": 2}
    relations: list[Relation] = [
        (("x", 1), ("y", 1), ("z", 1), ("t", -1)),
        (("only", 1), ("read", -1)),
    ]
    hidden = protect_cells(values, relations, THRESHOLD, known=["t", "read"])
    assert hidden == {"x", "y", "only"}


def test_a_needed_cell_is_hidden_only_when_it_saves_cells() -> None:
    # a 3 + b 20 = t 23. By hand: either b or t protects a alone; b is needed by readers
    # (priority 1), so t is hidden although b is the smaller count.
    values = {"a": 3, "b": 20, "t": 23}
    relations: list[Relation] = [(("a", 1), ("b", 1), ("t", -1))]
    assert protect_cells(values, relations, THRESHOLD, priority={"b": 1}) == {"a", "t"}
    assert protect_cells(values, relations, THRESHOLD) == {"a", "b"}


def test_the_hidden_set_does_not_depend_on_the_order_of_cells_or_relations() -> None:
    # b and c are exact ties as complements of a; the choice must not follow input order.
    relations: list[Relation] = [(("a", 1), ("b", 1), ("c", 1), ("t", -1))]
    results = set()
    for order in (["a", "b", "c", "t"], ["t", "c", "b", "a"], ["c", "a", "t", "b"]):
        values = {k: {"a": 3, "b": 40, "c": 40, "t": 83}[k] for k in order}
        for relation in (relations[0], tuple(reversed(relations[0]))):
            results.add(protect_cells(values, [relation], THRESHOLD, known=["t"]))
    table, more, priority = _two_way([[2, 6, 9, 6], [7, 6, 9, 6], [7, 9, 6, 9]])
    shuffled = [tuple(reversed(r)) for r in random.Random(3).sample(more, len(more))]
    first = protect_cells(table, more, THRESHOLD, priority=priority)
    assert (
        protect_cells(dict(reversed(table.items())), shuffled, THRESHOLD, priority=priority)
        == first
    )
    assert len(results) == 1


def test_latent_cells_are_unknown_but_never_hidden() -> None:
    # Two tables of the same 40 patients: a by b, with the four combinations latent. By hand:
    # a=yes 3 is primary; a=no 37 is its only complement in its table (40 is the priority-1
    # total); b's table is not linked to a's except through the latent cells, which absorb it.
    values = {"ay": 3, "an": 37, "by": 20, "bn": 20, "n": 40}
    values |= {"yy": 2, "yn": 1, "ny": 18, "nn": 19}
    relations: list[Relation] = [
        (("ay", 1), ("an", 1), ("n", -1)),
        (("by", 1), ("bn", 1), ("n", -1)),
        (("yy", 1), ("yn", 1), ("ay", -1)),
        (("ny", 1), ("nn", 1), ("an", -1)),
        (("yy", 1), ("ny", 1), ("by", -1)),
        (("yn", 1), ("nn", 1), ("bn", -1)),
    ]
    latent = {"yy", "yn", "ny", "nn"}
    hidden = protect_cells(values, relations, THRESHOLD, latent=latent, priority={"n": 1})
    assert hidden == {"ay", "an"}
    for cell in hidden:
        assert _exact_range(values, relations, hidden | latent, cell) >= THRESHOLD


def test_bad_input_is_refused() -> None:
    with pytest.raises(ValueError, match="threshold"):
        protect_cells({"a": 1}, [], 0)
    with pytest.raises(ValueError, match="non-negative"):
        protect_cells({"a": -1}, [], 5)
    with pytest.raises(ValueError, match="unknown cell"):
        protect_cells({"a": 1}, [(("a", 1), ("b", -1))], 5)
    with pytest.raises(ValueError, match="does not hold"):
        protect_cells({"a": 1, "b": 2}, [(("a", 1), ("b", -1))], 5)


@pytest.mark.parametrize("seed", range(12))
def test_feasible_range_equals_enumeration(seed: int) -> None:
    # Four unknown cells adding up to a shown total, tied by random relations with
    # coefficients up to 2 (so the linear relaxation can be fractional); every solution is
    # enumerated.
    rng = np.random.default_rng(100 + seed)
    truth = rng.integers(0, 6, size=4)
    values = {f"u{i}": int(v) for i, v in enumerate(truth)} | {"total": int(truth.sum())}
    relations: list[Relation] = [(*((f"u{i}", 1) for i in range(4)), ("total", -1))]
    for r in range(2):
        coefficients = rng.integers(-2, 3, size=4)
        side = int(coefficients @ truth)
        values[f"s{r}"] = abs(side)
        relations.append(
            (
                *((f"u{i}", int(c)) for i, c in enumerate(coefficients) if c),
                (f"s{r}", 1 if side < 0 else -1),
            )
        )
    solutions = [
        u
        for u in product(range(values["total"] + 1), repeat=4)
        if sum(u) == values["total"]
        and all(
            sum(c * (u[int(k[1])] if k.startswith("u") else values[k]) for k, c in rel) == 0
            for rel in relations[1:]
        )
    ]
    unknown = [f"u{i}" for i in range(4)]
    low, high = feasible_range("u0", values, relations, unknown)
    assert (low, high) == (min(u[0] for u in solutions), max(u[0] for u in solutions))


def test_enumeration_cases_include_a_fractional_relaxation() -> None:
    # Guard: some case above has a linear relaxation wider than the integer range, so the
    # integer solver, not only the relaxation, is exercised.
    wider = 0
    for seed in range(12):
        rng = np.random.default_rng(100 + seed)
        truth = rng.integers(0, 6, size=4)
        rows, rhs = [np.ones(4)], [float(truth.sum())]
        for _ in range(2):
            coefficients = rng.integers(-2, 3, size=4)
            rows.append(coefficients.astype(float))
            rhs.append(float(coefficients @ truth))
        objective = np.array([1.0, 0, 0, 0])
        ends = [linprog(s * objective, A_eq=np.array(rows), b_eq=rhs).fun for s in (1, -1)]
        width = -ends[1] - ends[0]
        exact = [
            u[0]
            for u in product(range(int(truth.sum()) + 1), repeat=4)
            if all(abs(np.dot(row, u) - b) < 1e-9 for row, b in zip(rows, rhs, strict=True))
        ]
        wider += width > max(exact) - min(exact) + 1e-9
    assert wider >= 1


def test_a_fractional_relaxation_is_not_taken_for_a_move() -> None:
    # 2x + 2y = z with z >= 3: the relaxation stops at x = 1.5, z = 3; integers need z even,
    # so the cheapest integer solution is z = 4 with x + y = 2 (by hand).
    matrix = sparse.csr_array(np.array([[2.0, 2.0, -1.0]]))
    x = _solve(np.array([1.0, 1.0, 0.0]), matrix, np.array([0.0, 0, 3]), np.full(3, np.inf))
    assert x is not None
    assert (matrix @ x).tolist() == [0.0]
    assert x[2] == 4
    assert x[0] + x[1] == 2


def test_a_count_in_no_relation_is_hidden_alone() -> None:
    # Nothing ties a to anything: hidden, it could be any count, and nothing else is hidden.
    assert protect_cells({"a": 3, "b": 7}, [], THRESHOLD) == {"a"}
    assert feasible_range("a", {"a": 3}, [], ["a"]) == (0.0, math.inf)
