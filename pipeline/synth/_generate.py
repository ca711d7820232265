"""Generate a synthetic Orvane Bay extract in chunks of patients, with its ground truth.

Why chunks: two million patients make about 300 million rows, more than memory should hold.
Each chunk of patients is drawn, sorted and appended to every table's file (a Parquet row
group, or more CSV lines) before the next one starts, so memory is bounded by the chunk size.

Why one random stream per chunk: chunk ``k`` draws from ``SeedSequence(seed).spawn()[k + 1]``
in a fixed order, so its rows depend only on the seed, the scenario and ``k``; chunks could be
drawn in parallel later without changing a byte. Patient numbers increase with the chunk, so
appending sorted chunks gives files sorted by patient_id overall.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from datetime import date
from pathlib import Path
from typing import Literal

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from pipeline.errors import AscertainError
from pipeline.outputs._ownership import SYNTH, check_folder, install, staging
from pipeline.synth._csv import spoil_dates
from pipeline.synth._events import (
    SYSTEMS,
    CodeBook,
    Columns,
    Visits,
    add_duplicates,
    concat,
    draw_diagnoses_and_prescriptions,
    draw_encounters,
    recognition_day,
)
from pipeline.synth._fhir_export import write_fhir_export
from pipeline.synth._labs import MEASURES, NO_TEXT, TEXTS, UNITS, draw_measurements
from pipeline.synth._population import NEVER, SEX_VALUES, Population, draw_population
from pipeline.synth._scenario import CONDITIONS, Scenario
from pipeline.synth._shapes import SHAPES, check_shapes, reshape

FileFormat = Literal["parquet", "csv", "fhir"]
TABLES: tuple[str, ...] = ("patients", "encounters", "diagnoses", "prescriptions", "measurements")
_EPOCH = date(1970, 1, 1)

_TEXT, _DATE = pa.string(), pa.date32()

# fmt: off
SCHEMAS: dict[str, pa.Schema] = {
    "patients": pa.schema([("patient_id", _TEXT), ("birth_date", _DATE),
                           ("birth_year", pa.int32()), ("sex", _TEXT), ("death_date", _DATE),
                           ("practice_id", _TEXT)]),
    "encounters": pa.schema([("patient_id", _TEXT), ("encounter_date", _DATE),
                             ("encounter_type", _TEXT)]),
    "diagnoses": pa.schema([("patient_id", _TEXT), ("event_date", _DATE),
                            ("code_system", _TEXT), ("code", _TEXT), ("source", _TEXT)]),
    "prescriptions": pa.schema([("patient_id", _TEXT), ("start_date", _DATE),
                                ("stop_date", _DATE), ("atc", _TEXT), ("drug_text", _TEXT)]),
    "measurements": pa.schema([("patient_id", _TEXT), ("obs_date", _DATE), ("measure", _TEXT),
                               ("value", pa.float64()), ("value_text", _TEXT),
                               ("unit", _TEXT)]),
    "truth": pa.schema([("patient_id", _TEXT), ("condition", _TEXT),
                        ("true_onset_date", _DATE)]),
}
# fmt: on
"""Column names and types of every file, in file column order."""


@dataclass(frozen=True)
class GenerationSummary:
    """What :func:`generate_extract` wrote.

    Attributes:
        out_dir: The extract folder.
        patients: Rows in ``patients``.
        orphan_patients: People whose rows exist but who have no ``patients`` row.
        seed: The seed used.
        file_format: ``parquet``, ``csv`` or ``fhir`` (``truth`` is always Parquet).
        rows: Row count per table, ``truth`` included.
        files: Every file written, sorted by name.
    """

    out_dir: Path
    patients: int
    orphan_patients: int
    seed: int
    file_format: FileFormat
    rows: dict[str, int]
    files: tuple[Path, ...]


def _day(d: date) -> int:
    return (d - _EPOCH).days


def _dates(days: np.ndarray) -> pa.Array:
    mask = days == NEVER
    return pa.array(np.where(mask, 0, days).astype(np.int32), mask=mask).cast(pa.date32())


def _strings(
    vocab: list[str] | tuple[str, ...], idx: np.ndarray, null: int | None = None
) -> pa.Array:
    """Strings by index into a vocabulary; ``null`` marks the index that stands for null."""
    arr = pa.array(list(vocab), type=pa.string())
    if null is None:
        return arr.take(pa.array(idx))
    mask = idx == null
    return arr.take(pa.array(np.where(mask, 0, idx), mask=mask))


def _pack(*fields: tuple[np.ndarray, int]) -> np.ndarray:
    """Pack small non-negative integer columns into one int64 key, first field most significant.

    One packed key sorts several times faster than ``np.lexsort`` over many columns.
    """
    key = np.zeros(fields[0][0].shape[0], dtype=np.int64)
    used = 0
    for values, bits in fields:
        used += bits
        if values.size and (values.min() < 0 or values.max() >= 1 << bits):
            raise AssertionError(f"sort field does not fit in {bits} bits")  # a generator bug
        key = (key << bits) | values.astype(np.int64)
    if used > 63:
        raise AssertionError("sort key wider than 63 bits")  # a generator bug
    return key


def _distinct(cols: Columns, *keys: np.ndarray) -> Columns:
    """Sort rows by ``keys`` and drop each row equal to the previous one.

    The keys are given most significant first and together identify a row. Chance
    coincidences (two same-type encounters on one day) are removed here, so that the exact
    duplicates in the output are only those added at the stated rate afterwards.
    """
    if len(keys) == 1:
        order = np.argsort(keys[0], kind="stable")
    else:
        order = np.lexsort(tuple(reversed(keys)))
    n = order.shape[0]
    new = np.ones(n, dtype=bool)
    if n > 1:
        same = np.ones(n - 1, dtype=bool)
        for key in keys:
            k = key[order]
            same &= k[1:] == k[:-1]
        new[1:] = ~same
    keep = order[new]
    return {k: v[keep] for k, v in cols.items()}


def patient_ids(numbers: np.ndarray) -> pa.Array:
    """``OB-`` followed by the 7-digit zero-padded patient number."""
    digits = pc.utf8_lpad(pc.cast(pa.array(numbers), pa.string()), 7, "0")
    return pc.binary_join_element_wise("OB-", digits, "")


def _after_death(
    rng: np.random.Generator, sc: Scenario, pop: Population
) -> tuple[np.ndarray, np.ndarray]:
    """People and days for stray rows dated 1-60 days after death (kept only within the data)."""
    dead = (pop.death_day != NEVER) & (rng.random(pop.size) < sc.p_events_after_death)
    owner = np.flatnonzero(dead)
    day = pop.death_day[owner] + rng.integers(1, 61, size=owner.shape[0])
    keep = day <= pop.end_day
    return owner[keep], day[keep]


def _chunk_tables(
    rng: np.random.Generator, sc: Scenario, book: CodeBook, pop: Population
) -> dict[str, pa.Table]:
    """Draw every table of one chunk and convert it to sorted Arrow tables."""
    recognised = recognition_day(rng, sc, pop)
    enc = draw_encounters(rng, sc, pop)
    d0 = int(pop.entry_day.min())
    visits = Visits(enc, d0)
    dx, rx = draw_diagnoses_and_prescriptions(rng, sc, pop, book, recognised, visits)
    meas = draw_measurements(rng, sc, pop, recognised, visits)
    added_owner, added_day = visits.added()
    owner, day = _after_death(rng, sc, pop)
    phone = sc.encounter_types.index("phone")
    visit = sc.encounter_types.index("visit")
    enc = concat(
        [
            enc,
            {"pidx": added_owner, "day": added_day, "etype": np.full(added_owner.shape[0], visit)},
            {"pidx": owner, "day": day, "etype": np.full(owner.shape[0], phone)},
        ]
    )
    weight = np.round(pop.bmi[owner] * (pop.height[owner] / 100.0) ** 2, 1)
    meas = concat(
        [
            meas,
            {
                "pidx": owner,
                "day": day,
                "measure": np.full(owner.shape[0], MEASURES.index("weight")),
                "value": weight,
                "text": np.full(owner.shape[0], NO_TEXT),
                "unit": np.full(owner.shape[0], UNITS.index("kg")),
            },
        ]
    )
    ids = patient_ids(pop.number)
    # patient (20 bits), day since start (17 bits), then the small category columns
    enc = _distinct(enc, _pack((enc["pidx"], 20), (enc["day"] - d0, 17), (enc["etype"], 4)))
    dx = _distinct(
        dx,
        _pack(
            (dx["pidx"], 20),
            (dx["day"] - d0, 17),
            (dx["system"], 1),
            (dx["code"], 10),
            (dx["source"], 2),
        ),
    )
    stop = np.where(rx["stop"] == NEVER, 1023, rx["stop"] - rx["start"])  # null stop sorts last
    rx = _distinct(rx, _pack((rx["pidx"], 20), (rx["start"] - d0, 17), (stop, 10), (rx["atc"], 8)))
    value_key = np.where(np.isnan(meas["value"]), np.inf, meas["value"])
    meas = _distinct(
        meas,
        _pack((meas["pidx"], 20), (meas["day"] - d0, 17), (meas["measure"], 4)),
        value_key,
        _pack((meas["text"], 10), (meas["unit"], 5)),
    )
    enc, dx, rx, meas = (add_duplicates(rng, t, sc.p_duplicate_row) for t in (enc, dx, rx, meas))
    return {
        "patients": _patients_table(sc, pop, ids),
        "encounters": pa.table(
            [
                ids.take(pa.array(enc["pidx"])),
                _dates(enc["day"]),
                _strings(sc.encounter_types, enc["etype"]),
            ],
            schema=SCHEMAS["encounters"],
        ),
        "diagnoses": pa.table(
            [
                ids.take(pa.array(dx["pidx"])),
                _dates(dx["day"]),
                _strings(SYSTEMS, dx["system"]),
                _strings(book.codes, dx["code"]),
                _strings(sc.dx_source_names, dx["source"]),
            ],
            schema=SCHEMAS["diagnoses"],
        ),
        "prescriptions": pa.table(
            [
                ids.take(pa.array(rx["pidx"])),
                _dates(rx["start"]),
                _dates(rx["stop"]),
                _strings(book.atc, rx["atc"]),
                _strings(book.drug_text, rx["atc"]),
            ],
            schema=SCHEMAS["prescriptions"],
        ),
        "measurements": pa.table(
            [
                ids.take(pa.array(meas["pidx"])),
                _dates(meas["day"]),
                _strings(MEASURES, meas["measure"]),
                pa.array(meas["value"], mask=np.isnan(meas["value"])),
                _strings(TEXTS, meas["text"], null=NO_TEXT),
                _strings(UNITS, meas["unit"]),
            ],
            schema=SCHEMAS["measurements"],
        ),
        "truth": _truth_table(pop, ids),
    }


def _patients_table(sc: Scenario, pop: Population, ids: pa.Array) -> pa.Table:
    real = np.flatnonzero(~pop.ghost)
    birth = np.where(pop.birth_date_missing, NEVER, pop.birth_day)[real]
    year = pop.birth_day[real].astype("datetime64[D]").astype("datetime64[Y]").astype(np.int64)
    sex = pop.sex_recorded[real]
    return pa.table(
        [
            ids.take(pa.array(real)),
            _dates(birth),
            pa.array((year + 1970).astype(np.int32)),
            _strings(SEX_VALUES, np.where(sex < 0, len(SEX_VALUES), sex), null=len(SEX_VALUES)),
            _dates(pop.death_day[real]),
            _strings(sc.practices, pop.practice[real]),
        ],
        schema=SCHEMAS["patients"],
    )


def _truth_table(pop: Population, ids: pa.Array) -> pa.Table:
    real = np.flatnonzero(~pop.ghost)
    onset = pop.true_onset_day()[real]
    k = len(CONDITIONS)
    return pa.table(
        [
            ids.take(pa.array(np.repeat(real, k))),
            _strings(CONDITIONS, np.tile(np.arange(k), real.shape[0])),
            _dates(onset.reshape(-1)),
        ],
        schema=SCHEMAS["truth"],
    )


class _Sink:
    """Appends chunk tables to one file per table: Parquet row groups or CSV lines."""

    def __init__(self, folder: Path, file_format: FileFormat) -> None:
        self.folder = folder
        self.file_format = file_format
        self.writers: dict[str, pq.ParquetWriter | pacsv.CSVWriter] = {}
        self.rows: dict[str, int] = {}

    def path(self, table: str) -> Path:
        ext = "parquet" if table == "truth" or self.file_format == "parquet" else "csv"
        return self.folder / f"{table}.{ext}"

    def write(self, table: str, data: pa.Table) -> None:
        if table not in self.writers:
            if self.path(table).suffix == ".parquet":
                self.writers[table] = pq.ParquetWriter(
                    self.path(table),
                    data.schema,
                    compression="zstd",
                    compression_level=3,
                    version="2.6",
                )
            else:
                self.writers[table] = pacsv.CSVWriter(self.path(table), data.schema)
            self.rows[table] = 0
        writer = self.writers[table]
        if isinstance(writer, pq.ParquetWriter):
            writer.write_table(data, row_group_size=1 << 20)
        else:
            writer.write_table(data)
        self.rows[table] += data.num_rows

    def close(self) -> None:
        for writer in self.writers.values():
            writer.close()


def _check_arguments(patients: int, file_format: str, start: date, end: date, sc: Scenario) -> None:
    if patients < 1 or patients > 9_000_000:
        raise AscertainError(f"patients must be between 1 and 9,000,000, got {patients}")
    if file_format not in ("parquet", "csv", "fhir"):
        raise AscertainError(f"file_format must be 'parquet', 'csv' or 'fhir', got {file_format!r}")
    if not 366 <= (end - start).days <= 100 * 366:
        raise AscertainError(f"the extract must cover 1 to 100 years, got {start} to {end}")
    if not 1 <= sc.chunk_size <= 1_000_000:
        raise AscertainError(
            f"the scenario's chunk_size must be 1 to 1,000,000, got {sc.chunk_size}"
        )
    if sc.copula_theta <= 0:
        raise AscertainError("the scenario's copula_theta must be positive")


def generate_extract(
    out_dir: Path,
    *,
    patients: int,
    seed: int,
    file_format: FileFormat = "parquet",
    start: date = date(2010, 1, 1),
    end: date = date(2021, 12, 31),
    scenario: Scenario | None = None,
    shapes: tuple[str, ...] = (),
) -> GenerationSummary:
    """Write a synthetic Orvane Bay extract with its ground truth to ``out_dir``.

    Files are written to a temporary folder beside ``out_dir`` and moved in only when all are
    complete, so a failure never leaves a partial extract behind. ``out_dir`` must be new,
    empty or a previous synthetic extract (listed in ``ascertain-synth.json``): only files a
    previous run wrote are replaced or removed (see :mod:`pipeline.outputs._ownership`).

    Args:
        out_dir: Destination folder (created if needed; a previous run's files are replaced).
        patients: Number of rows in ``patients``.
        seed: Seed of the random streams; same seed and parameters give identical bytes.
        file_format: Format of the five extract tables; ``fhir`` writes them as Parquet to
            the temporary folder, then as a FHIR R4 bulk-data export (NDJSON) in their place,
            as a server would write it with the same seed (see
            :mod:`pipeline.synth._fhir_export`); ``scenario.json`` then records, under
            ``fhir_export``, the extra resources written for the reader to set aside.
        start: First day of the extract.
        end: Last day of the extract.
        scenario: Parameters; the default Orvane Bay scenario when None.
        shapes: Names from :data:`~pipeline.synth._shapes.SHAPES`, each laid over the drawn
            rows with a random stream of its own (none: the default extract, unchanged);
            ``scenario.json`` records them under ``shapes``.

    Returns:
        A :class:`GenerationSummary`.

    Raises:
        AscertainError: An argument is out of range.
        OutputFolderError: ``out_dir`` holds files ascertain did not write there.
    """
    sc = scenario or Scenario()
    _check_arguments(patients, file_format, start, end, sc)
    shapes = check_shapes(shapes)
    if shapes and file_format == "fhir":
        raise AscertainError("extract shapes apply to Parquet and CSV extracts, not to FHIR")
    out_dir = Path(out_dir)
    check_folder(out_dir, SYNTH)
    with staging(out_dir) as tmp:
        written = "parquet" if file_format == "fhir" else file_format
        sink, orphans = _write_chunks(tmp, sc, patients, seed, written, (start, end), shapes)
        tables = [sink.path(t) for t in TABLES]
        fhir: dict[str, object] = {}
        if file_format == "fhir":
            export = write_fhir_export(tmp, tmp / "fhir", seed=seed)
            tables = list(export.files)
            # What the export wrote beyond the canonical rows, so a build can be checked
            # against it: the extra resources set aside, and the varied forms.
            set_aside = [
                {"table": t, "reason": r, "resources": n} for (t, r), n in export.set_aside.items()
            ]
            fhir = {"fhir_export": {"set_aside": set_aside, "forms": export.forms}}
        meta = {
            "end": end.isoformat(),
            "file_format": file_format,
            "patients": patients,
            "seed": seed,
            "start": start.isoformat(),
            "orphan_patients": orphans,
            "scenario": sc.to_dict(),
            **fhir,
            **({"shapes": {s: SHAPES[s] for s in shapes}} if shapes else {}),
        }
        text = json.dumps(meta, sort_keys=True, indent=2, ensure_ascii=False) + "\n"
        (tmp / "scenario.json").write_text(text, encoding="utf-8")
        files = sorted([*tables, sink.path("truth"), tmp / "scenario.json"], key=lambda f: f.name)
        names = [f.name for f in files]
        # Only the extract's files go in: the FHIR export leaves its canonical tables behind.
        final = tmp / "final"
        final.mkdir()
        for path in files:
            os.replace(path, final / path.name)
        install(final, out_dir, SYNTH, names)
    return GenerationSummary(
        out_dir=out_dir,
        patients=patients,
        orphan_patients=orphans,
        seed=seed,
        file_format=file_format,
        rows=dict(sorted(sink.rows.items())),
        files=tuple(out_dir / n for n in names),
    )


def _write_chunks(
    folder: Path,
    sc: Scenario,
    patients: int,
    seed: int,
    file_format: FileFormat,
    span: tuple[date, date],
    shapes: tuple[str, ...],
) -> tuple[_Sink, int]:
    """Draw and write every chunk; returns the sink (row counts) and the orphan count."""
    start, end = span
    sizes = [sc.chunk_size] * (patients // sc.chunk_size)
    if patients % sc.chunk_size:
        sizes.append(patients % sc.chunk_size)
    streams = np.random.SeedSequence(seed).spawn(len(sizes) + 1)
    ghosts = np.random.default_rng(streams[0]).binomial(sizes, sc.p_orphan_patient)
    book = CodeBook(sc)
    sink = _Sink(folder, file_format)
    offset = 0
    try:
        for k, (size, n_ghost) in enumerate(zip(sizes, ghosts, strict=True)):
            rng = np.random.default_rng(streams[k + 1])
            slots = size + int(n_ghost)
            ghost = np.zeros(slots, dtype=bool)
            ghost[rng.choice(slots, size=int(n_ghost), replace=False)] = True
            numbers = offset + 1 + np.arange(slots, dtype=np.int64)
            offset += slots
            pop = draw_population(
                rng, sc, numbers=numbers, ghost=ghost, start_day=_day(start), end_day=_day(end)
            )
            tables = _chunk_tables(rng, sc, book, pop)
            if shapes:
                # A child of the chunk's stream: the drawn rows stay those of the default.
                tables = reshape(tables, shapes, np.random.default_rng(streams[k + 1].spawn(1)[0]))
            if file_format == "csv":
                spoil_dates(rng, tables, sc.p_unreadable_date_row)
            for name, table in tables.items():
                sink.write(name, table)
    finally:
        sink.close()
    return sink, int(ghosts.sum())
