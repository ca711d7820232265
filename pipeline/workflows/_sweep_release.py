"""The sweep's counts and its kept variants' reports released as one linked system.

``sweep.csv``, ``sweep.html`` and the ``report.html`` of each variant kept with ``--keep`` are
released together and count the same patients: a kept variant's cohort size, at-risk,
incident and non-incident counts are printed in its report's flow and incidence table and in
the sweep's table. Suppressed apart, a count one of them hides to protect a small count could
be printed by the other. So the report's cells (:func:`report_system`, names prefixed by the
variant) join the sweep's (:func:`cell_system`), each shared count is tied to its twin by an
identity, and :func:`protect_cells` chooses the hidden counts of all of them at once.

Not covered: cells of two kept reports that count overlapping patients other than through
the tied counts (Table 1 of one variant against Table 1 of another), as for the reports of
any two separate builds.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from pipeline.outputs.report._write import ReportParts
from pipeline.stats import protect_cells
from pipeline.workflows._sweep_numbers import _relation, cell_system, released_rows

_TWINS = (
    ("cohort", "N"),
    ("at_risk", "atrisk|{o}"),
    ("incident", "events|{o}"),
    ("at_risk_not_incident", "nonevents|{o}"),
)
"""A sweep row's patient set and the report key that counts the same patients (``_tables``)."""


def joint_release(
    rows: list[dict[str, Any]], base_threshold: int, reports: Mapping[str, ReportParts]
) -> tuple[list[dict[str, Any]], dict[str, frozenset[str]], int]:
    """Suppress the sweep's rows and the kept reports' counts as one system.

    Args:
        rows: The sweep's exact rows (:func:`sweep_rows`).
        base_threshold: The base study's small-cell threshold.
        reports: Each kept variant's report tables, by variant name (``base`` too).

    Returns:
        The released rows, each report's hidden keys, and the threshold used: the largest of
        the base's and the kept studies' (one system has one threshold; the stricter one
        never shows a count any of them would hide). Without kept reports the rows are those
        :func:`released_rows` gives alone.
    """
    threshold = max([base_threshold, *(p.study.threshold for p in reports.values())])
    values, relations, latent_cells, priority = cell_system(rows, threshold)
    latent, known = set(latent_cells), set()
    for name, parts in reports.items():
        prefix, system = f"report:{name}:", parts.system
        values |= {prefix + k: v for k, v in system.values.items()}
        relations += [tuple((prefix + k, c) for k, c in r) for r in system.relations]
        latent |= {prefix + k for k in system.latent}
        known |= {prefix + k for k in system.known}
        priority |= {prefix + k: v for k, v in system.priority.items()}
        for row in rows:
            if row["variant"] != name:
                continue
            for kind, key in _TWINS:
                printed = key.format(o=row["outcome"])
                if printed in system.printed:
                    twin = prefix + system.cell(printed)
                    relations.append(_relation((row["sets"][kind].key(), 1), (twin, -1)))
    hidden = protect_cells(
        values,
        sorted({r for r in relations if r}),
        threshold,
        latent=latent,
        known=known,
        priority=priority,
    )
    released = released_rows(rows, threshold, hidden=hidden)
    per_report = {
        name: parts.system.hidden(
            frozenset(
                c.removeprefix(f"report:{name}:") for c in hidden if c.startswith(f"report:{name}:")
            )
        )
        for name, parts in reports.items()
    }
    return released, per_report, threshold


__all__ = ["joint_release"]
