"""Treatment episodes of a new-user study (``exposure: {episodes: ...}``): ``episodes.parquet``.

Every usable record of an exposure group of a cohort patient, dated on or after the index date,
covers its days (a prescription from its start to its stop date, both included; without a
usable stop date, ``cover_without_stop_days`` from its date). Per patient and group, records
in date order join the current episode while the days between the cover so far and the next
record's start number at most ``grace_days``; otherwise the record opens a new episode. The
cover so far is the latest cover end of the earlier records (a running maximum), so overlapping
days count once and nothing is stockpiled. Records of the other groups (a switch, an add-on)
make episodes of their own group.
"""

from __future__ import annotations

from sqlglot import exp

from pipeline.compile import names
from pipeline.compile._context import CompileContext, evidence_number, exposure_key
from pipeline.compile._plan import ColumnDoc, Stage
from pipeline.compile._sql import add_days, days_between, expression, query, values_table

_EPISODES = """
WITH rx AS (
  SELECT
    r.patient_id,
    g.exposure_group,
    r.event_date AS rx_start,
    :rx_end AS rx_end
  FROM :rows AS r
  JOIN :groups ON g.evidence = r.evidence
  JOIN :cohort AS c ON c.patient_id = r.patient_id
  WHERE NOT r.excluded AND r.event_date >= c.index_date
), covered AS (
  SELECT
    patient_id,
    exposure_group,
    rx_start,
    rx_end,
    MAX(rx_end) OVER (
      PARTITION BY patient_id, exposure_group ORDER BY rx_start, rx_end
      ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING
    ) AS covered_to
  FROM rx
), opened AS (
  SELECT
    patient_id,
    exposure_group,
    rx_start,
    rx_end,
    SUM(CASE WHEN covered_to IS NULL OR :gap > :grace THEN 1 ELSE 0 END) OVER (
      PARTITION BY patient_id, exposure_group ORDER BY rx_start, rx_end
      ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW
    ) AS episode_number
  FROM covered
)
SELECT
  patient_id,
  exposure_group AS exposure,
  CAST(episode_number AS INT) AS episode_number,
  MIN(rx_start) AS episode_start,
  MAX(rx_end) AS episode_end,
  CAST(COUNT(*) AS INT) AS prescriptions
FROM opened
GROUP BY patient_id, exposure_group, episode_number
"""


def episode_stages(ctx: CompileContext) -> tuple[Stage, ...]:
    """``episodes``: each cohort patient's treatment episodes (none without ``episodes:``)."""
    exposure = ctx.study.exposure
    if exposure is None or exposure.episodes is None:
        return ()
    rule = exposure.episodes
    rows = [(evidence_number(exposure_key(g)), g) for g in sorted(exposure.groups)]
    cover = expression(
        "GREATEST(COALESCE(r.duration_days, :cover), 1) - 1", cover=rule.cover_without_stop_days
    )
    return (
        Stage(
            names.EPISODES,
            query(
                _EPISODES,
                rows=exp.to_table(names.CODED_ROW_EVIDENCE),
                groups=values_table("g", ["evidence", "exposure_group"], rows),
                cohort=exp.to_table(names.COHORT),
                rx_end=add_days(exp.column("event_date", "r"), cover),
                gap=days_between(exp.column("covered_to"), exp.column("rx_start")) - 1,
                grace=rule.grace_days,
            ),
            "treatment episodes of each cohort patient and exposure group from the index date",
        ),
    )


def episode_outputs(ctx: CompileContext) -> tuple[tuple[str, str, tuple[str, ...]], ...]:
    """The plan output written as ``episodes.parquet`` (none without ``episodes:``)."""
    exposure = ctx.study.exposure
    if exposure is None or exposure.episodes is None:
        return ()
    return ((names.EPISODES, names.EPISODES, ("patient_id", "exposure", "episode_number")),)


def episode_docs(ctx: CompileContext) -> tuple[ColumnDoc, ...]:
    """The data dictionary of ``episodes.parquet``, every column in file order."""
    exposure = ctx.study.exposure
    if exposure is None or exposure.episodes is None:
        return ()
    rule = exposure.episodes
    cover = (
        f"a prescription covers start_date to stop_date, both included; without a usable stop "
        f"date (or a diagnosis record) {rule.cover_without_stop_days} days from its date"
    )
    joined = (
        f"records of one group join while at most {rule.grace_days} uncovered days separate "
        "the next record from the cover so far; overlapping days count once (no stockpiling)"
    )
    return (
        ColumnDoc("patient_id", "same as cohort.parquet", "", "the patient", "cohort", "extract"),
        ColumnDoc(
            "exposure",
            "VARCHAR",
            "",
            f"the exposure group of the episode: one of {', '.join(exposure.groups)}",
            "the group whose evidence the records match; another group than the cohort's "
            "exposure is a switch or an add-on",
            "prescriptions",
        ),
        ColumnDoc(
            "episode_number",
            "INTEGER",
            "",
            "1, 2, ... in date order per patient and group",
            joined,
            "prescriptions",
        ),
        ColumnDoc(
            "episode_start",
            "DATE",
            "",
            "date of the episode's first record",
            "records dated on or after the index date only",
            "prescriptions",
        ),
        ColumnDoc(
            "episode_end",
            "DATE",
            "",
            "last day the episode's records cover (may pass end of data)",
            cover,
            "prescriptions",
        ),
        ColumnDoc(
            "prescriptions",
            "INTEGER",
            "records",
            "records joined into the episode",
            "usable records (an exact duplicate once when duplicates are checked)",
            "prescriptions",
        ),
    )
