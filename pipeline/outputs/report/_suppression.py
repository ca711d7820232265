"""The small-cell suppression shared by every table of the study report.

Every released count of the report (the flow, Table 1 of each outcome, incidence,
combinations, dependence, the numbers at risk under the curves and the quality log) is one
cell of a single system, suppressed together by :func:`pipeline.stats.protect_cells`:

- Each count has a *key* naming the set it counts; a set shown in two tables (the cohort size
  in the flow and Table 1, the events of an outcome in the incidence table and as a Table 1
  column, and, in a matched study, as the flow's sets line ``match_cases``) has one key, so
  it is hidden everywhere or nowhere.
- Relations within tables: parts add up to their row total (flow, incidence, dependence, the
  Table 1 groups); each Table 1 variable's rows add up to its group's size (a count of the
  patients row); quality lines add up to the rows read of their source table (a count that is
  not printed but taken as known).
- Relations across tables: every count of patients of the cohort is described by whom it counts
  (:mod:`._cells`) and tied to latent atoms of the cohort, which implies every identity
  between the tables (events of X = both + first only in the dependence table + Table 1's
  "incident X, prevalent Y" cell, combinations against incidence, and so on). Counts with the
  same atoms share a key. The numbers at risk under the curves are tied to the incidence table
  through latent bins of follow-up time (:mod:`._at_risk`).
- Complements are chosen from the detailed tables first (Table 1 by outcome, combinations,
  dependence, quality), then Table 1's overall column and the flow, then events and group
  sizes, and the cohort size and source population last: those are the numbers readers need.
  Each rank costs as much as a thousand cells of the rank below (see ``protect_cells``). The
  rows read of a source table are known to a reader and never hidden; so is the cohort size,
  which manifest.json states exactly.

Numbers derived from counts (percentages, estimates, intervals, odds ratios) are left empty
wherever a count they are computed from is hidden.

A hidden count below the threshold is published as ``<threshold``; a larger count hidden only
to protect a small one is published as ``*``, so no published marker misstates a count.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import polars as pl

from pipeline.compile import names
from pipeline.outputs.report._cells import Spec, aliases, atom_relations, cohort_atoms
from pipeline.stats import baseline_variables, protect_cells
from pipeline.stats._disclosure import Relation, shown

# The flow's last eligibility line's remaining count (the last line, or the line before the
# matching lines): the cohort size, which manifest.json (rows.cohort) also states exactly, so a
# reader knows it whatever the report shows.
COHORT_KEY = "N"
_PRIORITY = (  # how much readers need a count; complements come from low ranks first
    (3, ("N", "src")),
    (2, ("events|", "nonevents|", "atrisk|", "t1size|")),
    (1, ("flow|", "removed|")),
)


def _priority(key: str) -> int:
    """A key's rank: Table 1's overall column (``t1|variable|row``) ranks with the flow."""
    if key.startswith("t1|") and key.count("|") == 2:
        return 1
    return next((rank for rank, starts in _PRIORITY if key.startswith(starts)), 0)


@dataclass(frozen=True)
class Block:
    """One table as suppression sees it: counts, their keys, meanings and relations.

    Attributes:
        frame: Integer count columns, plus ``<column>#key`` string columns naming each cell.
        counts: Count columns (the parts).
        total: Column holding each row's total, if rows add up.
        relations: Further identities between keys (beyond rows adding up to ``total``).
        meanings: For counts of cohort patients, which patients (see :mod:`._cells`).
        extra: Counts that are not printed but taken as known (e.g. rows read), by key.
        unprinted: Keys of counts that are not printed but that readers can work out from
            printed ones (the patients whose follow-up ends between two columns of a
            numbers-at-risk table): one of 1 to ``threshold - 1`` is hidden and protected like
            a printed count; the others are latent.
    """

    frame: pl.DataFrame
    counts: tuple[str, ...]
    total: str | None = None
    relations: tuple[Relation, ...] = ()
    meanings: Mapping[str, Spec] = field(default_factory=dict)
    extra: Mapping[str, int] = field(default_factory=dict)
    unprinted: frozenset[str] = frozenset()

    @property
    def cells(self) -> tuple[str, ...]:
        """Every count column, the total included."""
        return (*self.counts, *([self.total] if self.total else []))

    def values(self) -> dict[str, int]:
        """Each key's count (a key repeated in the block has one count)."""
        out = dict(self.extra)
        for c in self.cells:
            out.update(zip(self.frame[f"{c}#key"].to_list(), self.frame[c].to_list(), strict=True))
        return out

    def all_relations(self) -> list[Relation]:
        """The block's relations, with each row's parts adding up to its total."""
        out = list(self.relations)
        if self.total:
            keys = self.frame.select(f"{c}#key" for c in self.cells).rows()
            out.extend(((*((k, 1) for k in row[:-1]), (row[-1], -1))) for row in keys)
        return out


@dataclass(frozen=True)
class CellSystem:
    """The report's counts as one system for :func:`pipeline.stats.protect_cells`.

    Attributes:
        values: Every cell's value, latent ones included, by cell (a printed key's alias).
        relations: Identities between cells.
        latent: Cells never released.
        known: Cells a reader knows though they are not printed (never hidden).
        priority: How much readers need each cell.
        alias: A printed key's cell, where several keys count the same patients.
        printed: The keys of the printed counts.
    """

    values: dict[str, int]
    relations: list[Relation]
    latent: frozenset[str]
    known: frozenset[str]
    priority: dict[str, int]
    alias: dict[str, str]
    printed: frozenset[str]

    def cell(self, key: str) -> str:
        """The cell a printed key names."""
        return self.alias.get(key, key)

    def hidden(self, cells: frozenset[str]) -> frozenset[str]:
        """The printed keys whose cell is among ``cells`` (what protect_cells chose)."""
        return frozenset(k for k in self.printed if self.cell(k) in cells)


def report_system(
    blocks: Sequence[Block], threshold: int, cohort: pl.DataFrame, outcomes: Sequence[str]
) -> CellSystem:
    """Every table of the report as one system of cells (see the module docstring).

    Kept apart from :func:`hidden_keys` so that a caller releasing other counts of the same
    patients beside the report (the definition sweep) can solve both as one system.
    """
    values: dict[str, int] = {}
    meanings: dict[str, Spec] = {}
    relations: list[Relation] = []
    known: set[str] = set()
    unprinted: set[str] = set()
    for block in blocks:
        values |= block.values()
        unprinted |= block.unprinted
        meanings |= block.meanings
        relations += block.all_relations()
        known |= set(block.extra)
    prevalent = {names.prevalent_column(o) for o in outcomes}
    # a new-user cohort's exposure group splits it like a state: Table 1 is grouped by it too
    grouping = [names.EXPOSURE] if names.EXPOSURE in cohort.columns else []
    variables = [v for v in baseline_variables(cohort) if v not in prevalent | set(grouping)]
    atoms = cohort_atoms(cohort, outcomes, variables, grouping)
    relations += atom_relations(atoms, meanings)
    alias = aliases(atoms, meanings)
    # An unprinted count is protected when it is small, else only ties printed ones together.
    large = {k: values.pop(k) for k in sorted(unprinted) if not 0 < values[k] < threshold}
    latent = atoms.values() | large
    merged: dict[str, int] = {}
    for key, value in {**values, **latent}.items():
        merged[alias.get(key, key)] = value
    priority: dict[str, int] = {}
    for key in values:  # a key shared by tables gets the priority of its most needed use
        rank = _priority(key)
        priority[alias.get(key, key)] = max(rank, priority.get(alias.get(key, key), 0))
    if COHORT_KEY in values:  # manifest.json states the exact cohort size: never hidden
        known.add(alias.get(COHORT_KEY, COHORT_KEY))
    unique: set[Relation] = set()
    for relation in relations:
        summed: dict[str, int] = {}
        for k, c in relation:
            summed[alias.get(k, k)] = summed.get(alias.get(k, k), 0) + c
        if len(kept := tuple(sorted((k, c) for k, c in summed.items() if c))) > 1:
            unique.add(kept)
    return CellSystem(
        merged,
        sorted(unique),
        frozenset(latent),
        frozenset(known),
        priority,
        alias,
        frozenset(values),
    )


def hidden_keys(
    blocks: Sequence[Block], threshold: int, cohort: pl.DataFrame, outcomes: Sequence[str]
) -> frozenset[str]:
    """Keys of every count to hide, chosen over all tables at once (see the module docstring).

    Args:
        blocks: Every table of the report.
        threshold: Smallest count that may be shown.
        cohort: The analysis table the counts were taken from (for the atoms).
        outcomes: The study's outcomes.

    Returns:
        The hidden keys.
    """
    system = report_system(blocks, threshold, cohort, outcomes)
    return system.hidden(protect_system(system, threshold))


def protect_system(system: CellSystem, threshold: int) -> frozenset[str]:
    """The cells of ``system`` to hide (:func:`pipeline.stats.protect_cells` on all of it)."""
    return protect_cells(
        system.values,
        system.relations,
        threshold,
        latent=system.latent,
        known=system.known,
        priority=system.priority,
    )


def keyed_frame(rows: list[dict[str, Any]], schema: dict[str, Any]) -> pl.DataFrame:
    return pl.DataFrame(rows, schema=schema, orient="row")


def masked(block: Block, hidden: frozenset[str], threshold: int) -> pl.DataFrame:
    """The block's frame with every count as published text and the key columns dropped."""
    return block.frame.with_columns(
        pl.Series(
            c,
            [
                shown(v, k, hidden, threshold)
                for v, k in zip(
                    block.frame[c].to_list(), block.frame[f"{c}#key"].to_list(), strict=True
                )
            ],
            dtype=pl.String,
        )
        for c in block.cells
    ).drop([f"{c}#key" for c in block.cells])
