"""What each count of the report means, as a sum of latent patient groups (*atoms*).

The suppression system (:mod:`pipeline.stats._disclosure`) needs every identity a reader could
use between released counts, within a table and across tables. Listing them by hand misses
some (events of X = both + first only in the dependence table + the Table 1 cell "incident X
and prevalent Y"). Instead each count is described by the patients it counts, and the cohort is
split into atoms no released count cuts through:

- an *outcome atom* is a combination of every outcome's state (``incident_X``,
  ``prevalent_X`` and ``at_risk_X``, each true, false or null);
- a *level atom* is an outcome atom crossed with the level of one Table 1 variable (its value,
  or ``non-missing`` for numeric variables, or ``missing``).

A column a Table 1 is grouped by other than an outcome (a new-user study's ``exposure``) is
part of the outcome atoms, like a state, so a count can describe its group and a level.

A released count is the sum of the atoms matching its description, and each outcome atom is
the sum of its level atoms for every variable. These relations imply every linear identity
between the released counts that holds because of what they count. The atoms are every
combination of the states each outcome takes in the cohort (incident implies at risk, so
"incident and prevalent" is not an atom) with every level a variable takes: a reader knows
how the states of one outcome relate, but not which combinations of outcomes and levels are
empty. Two counts with the same atoms count the same patients by definition and get one key
(:func:`aliases`), so they are shown or hidden together.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from itertools import product

import polars as pl

from pipeline.compile import names
from pipeline.stats._disclosure import Relation

Spec = tuple[tuple[str, str], ...]
"""A count's description: (column, label) conditions all patients counted meet.

Columns are ``inc|X``, ``prev|X``, ``at|X`` (labels ``true``, ``false``, ``null``) or a Table
1 variable (labels its levels, ``non-missing`` or ``missing``); at most one variable.
"""


def _state_label(column: str) -> pl.Expr:
    return (
        pl.when(pl.col(column).is_null())
        .then(pl.lit("null"))
        .when(pl.col(column))
        .then(pl.lit("true"))
        .otherwise(pl.lit("false"))
    )


def _level_label(cohort: pl.DataFrame, variable: str) -> pl.Expr:
    value = pl.col(variable)
    present = (
        pl.lit("non-missing") if cohort.schema[variable].is_numeric() else value.cast(pl.String)
    )
    return pl.when(value.is_null()).then(pl.lit("missing")).otherwise(present)


@dataclass(frozen=True)
class Atoms:
    """The atoms of a cohort: counts of outcome atoms and of level atoms per variable."""

    states: tuple[str, ...]
    outcome: dict[tuple[str, ...], int]
    levels: dict[str, dict[tuple[tuple[str, ...], str], int]]

    def key(self, state: tuple[str, ...], variable: str | None = None, level: str = "") -> str:
        """The atom's cell key."""
        name = "atom|" + ",".join(state)
        return f"{name}|{variable}={level}" if variable else name

    def select(self, spec: Spec) -> list[str]:
        """Keys of the atoms a count with this description adds up."""
        wanted = dict(spec)
        variables = [c for c in wanted if c not in self.states]
        if len(variables) > 1:
            raise ValueError(f"a count describes at most one variable, got {variables}")

        def matches(state: tuple[str, ...]) -> bool:
            return all(wanted.get(c, s) == s for c, s in zip(self.states, state, strict=True))

        if not variables:
            return [self.key(s) for s in self.outcome if matches(s)]
        (v,) = variables
        return [
            self.key(s, v, level)
            for s, level in self.levels[v]
            if matches(s) and level == wanted[v]
        ]

    def values(self) -> dict[str, int]:
        """Every atom's count."""
        out = {self.key(s): n for s, n in self.outcome.items()}
        for v, counts in self.levels.items():
            out |= {self.key(s, v, level): n for (s, level), n in counts.items()}
        return out

    def relations(self) -> list[Relation]:
        """Each outcome atom is the sum of its level atoms, for every variable."""
        out: list[Relation] = []
        for v, counts in self.levels.items():
            for s in self.outcome:
                parts = [self.key(s, v, level) for (t, level) in counts if t == s]
                out.append(((self.key(s), -1), *((p, 1) for p in parts)))
        return out


def cohort_atoms(
    cohort: pl.DataFrame,
    outcomes: Sequence[str],
    variables: Iterable[str],
    grouping: Sequence[str] = (),
) -> Atoms:
    """Split the cohort into atoms (see the module docstring).

    Args:
        cohort: The analysis table.
        outcomes: Outcome names ``X`` (columns ``incident_X``, ``prevalent_X``, ``at_risk_X``).
        variables: Table 1 variables other than ``prevalent_X`` of an outcome (those are outcome
            states already) and other than ``grouping``.
        grouping: Columns that split the cohort like an outcome's state, because a Table 1 is
            grouped by them (a new-user study's ``exposure``): a count can then describe a
            group and a level at once. Labelled like a variable's levels (``missing`` for null).
    """
    states = tuple(f"{p}|{o}" for o in outcomes for p in ("inc", "prev", "at")) + tuple(grouping)
    columns = {
        "inc": names.INCIDENT_PREFIX,
        "prev": names.PREVALENT_PREFIX,
        "at": names.AT_RISK_PREFIX,
    }
    labelled = cohort.select(
        *(
            _state_label(columns[s.split("|")[0]] + s.split("|")[1]).alias(s)
            for s in states[: 3 * len(outcomes)]
        ),
        *(_level_label(cohort, g).alias(g) for g in grouping),
        *(_level_label(cohort, v).alias(f"level|{v}") for v in variables),
    )
    counted = {tuple(r[:-1]): int(r[-1]) for r in labelled.group_by(list(states)).len().iter_rows()}
    # the (incident, prevalent, at risk) states each outcome takes, then each grouping's values
    spans = [(i, i + 3) for i in range(0, 3 * len(outcomes), 3)]
    spans += [(i, i + 1) for i in range(3 * len(outcomes), len(states))]
    per_outcome = [sorted({state[a:b] for state in counted}) for a, b in spans]
    outcome = {
        s: counted.get(s, 0)
        for s in (tuple(x for part in combo for x in part) for combo in product(*per_outcome))
    }
    levels = {}
    for v in variables:
        grouped = labelled.group_by([*states, f"level|{v}"]).len()
        found = {(tuple(r[:-2]), str(r[-2])): int(r[-1]) for r in grouped.iter_rows()}
        seen = sorted({level for _, level in found})
        levels[v] = {(s, level): found.get((s, level), 0) for s in outcome for level in seen}
    return Atoms(states, outcome, levels)


def atom_relations(atoms: Atoms, meanings: Mapping[str, Spec]) -> list[Relation]:
    """Each described count minus the sum of its atoms is zero; plus the atoms' own relations."""
    out = atoms.relations()
    for key, spec in sorted(meanings.items()):
        out.append(((key, -1), *((a, 1) for a in atoms.select(spec))))
    return out


def aliases(atoms: Atoms, meanings: Mapping[str, Spec]) -> dict[str, str]:
    """Map each described key to one key per set of atoms (the first in sorted order).

    Counts with the same atoms count the same patients of this cohort; giving them one key
    makes them hidden or shown together.
    """
    first: dict[frozenset[str], str] = {}
    out = {}
    for key in sorted(meanings):
        atoms_of = frozenset(atoms.select(meanings[key]))
        out[key] = first.setdefault(atoms_of, key) if atoms_of else key
    return out
