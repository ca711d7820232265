"""Differently shaped extracts of the same canonical schema, laid over the drawn chunks.

Why: a tool tuned on one extract can be slow on another of the same schema but a different
shape (text beside every number, integer ids, many practices, more mess, columns nobody
reads). Each shape here rewrites a chunk's finished Arrow tables after the default draw, with
a random stream of its own, so the default extract is byte-identical with or without this
module and a shape changes only what its description says.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from pipeline.errors import AscertainError

Tables = dict[str, pa.Table]
EVENT_TABLES = ("encounters", "diagnoses", "prescriptions", "measurements")

SHAPES: dict[str, str] = {
    "value_text": "every measurement with a numeric value also carries it as text in "
    "value_text ('6.5', '120'), as many clinical systems write both",
    "integer_ids": "patient_id is a 64-bit integer (the patient number) in every table",
    "many_practices": "800 practices instead of 14 (each practice split by patient number)",
    "messy": "about 10 times the exact duplicates (5% more event rows) and 3% of numeric "
    "measurements unreadable (text such as 'see note' instead of a value)",
    "wide": "eight extra columns on every event table that no study reads (who entered the "
    "row, when, a record key, a free note, a batch number...)",
}
"""Shape name -> what it changes; applied in this order when several are asked for."""

PRACTICES = 800
P_EXTRA_DUPLICATE = 0.05
P_UNREADABLE_VALUE = 0.03
UNREADABLE_TEXTS = ("see note", "pending", "??", "1..2", "not done", "result to follow")
"""Text a clerk or an interface leaves where a number should be; none of it parses."""


def check_shapes(shapes: tuple[str, ...]) -> tuple[str, ...]:
    """The shapes in application order, each once.

    Raises:
        AscertainError: An unknown shape (the message lists the known ones).
    """
    unknown = [s for s in shapes if s not in SHAPES]
    if unknown:
        raise AscertainError(f"unknown extract shape '{unknown[0]}'; known: {', '.join(SHAPES)}")
    return tuple(s for s in SHAPES if s in shapes)


def _numbers(ids: pa.Array) -> np.ndarray:
    """Patient numbers from ``OB-0000012`` ids (or integer ids, unchanged)."""
    if pa.types.is_integer(ids.type):
        return ids.to_numpy(zero_copy_only=False)
    digits = pc.utf8_slice_codeunits(ids, 3)
    return pc.cast(digits, pa.int64()).to_numpy(zero_copy_only=False)


def _value_text(tables: Tables, rng: np.random.Generator) -> Tables:
    del rng  # the text follows from the value
    meas = tables["measurements"]
    value = meas.column("value")
    # Arrow writes 120.0 as "120" and 6.5 as "6.5": what a system printing the number shows.
    text = pc.if_else(pc.is_null(value), meas.column("value_text"), pc.cast(value, pa.string()))
    index = meas.schema.get_field_index("value_text")
    return {**tables, "measurements": meas.set_column(index, "value_text", text)}


def _integer_ids(tables: Tables, rng: np.random.Generator) -> Tables:
    del rng
    out = {}
    for name, table in tables.items():
        index = table.schema.get_field_index("patient_id")
        ids = pa.array(_numbers(table.column("patient_id").combine_chunks()), pa.int64())
        out[name] = table.set_column(index, pa.field("patient_id", pa.int64()), ids)
    return out


def _many_practices(tables: Tables, rng: np.random.Generator) -> Tables:
    del rng
    patients = tables["patients"]
    old = patients.column("practice_id").combine_chunks()
    # Base practices are P01..P14; practice i's patients spread over its own share of 800.
    base = pc.cast(pc.utf8_slice_codeunits(old, 1), pa.int64()).to_numpy() - 1
    first = base * PRACTICES // 14
    width = (base + 1) * PRACTICES // 14 - first
    number = first + _numbers(patients.column("patient_id").combine_chunks()) % width + 1
    names = pc.binary_join_element_wise(
        "P", pc.utf8_lpad(pc.cast(pa.array(number), pa.string()), 3, "0"), ""
    )
    index = patients.schema.get_field_index("practice_id")
    return {**tables, "patients": patients.set_column(index, "practice_id", names)}


def _with_copies(table: pa.Table, rng: np.random.Generator, share: float) -> pa.Table:
    """Each row repeated once more with probability ``share``, next to itself (order kept)."""
    n = table.num_rows
    reps = 1 + (rng.random(n) < share).astype(np.int64)
    return table.take(pa.array(np.repeat(np.arange(n), reps)))


def _messy(tables: Tables, rng: np.random.Generator) -> Tables:
    out = dict(tables)
    meas = tables["measurements"]
    value = meas.column("value").to_numpy(zero_copy_only=False)
    spoil = ~np.isnan(value) & (rng.random(value.shape[0]) < P_UNREADABLE_VALUE)
    texts = pa.array(UNREADABLE_TEXTS).take(
        pa.array(rng.integers(0, len(UNREADABLE_TEXTS), value.shape[0]))
    )
    mask = pa.array(spoil)
    meas = meas.set_column(
        meas.schema.get_field_index("value"),
        "value",
        pc.if_else(mask, pa.scalar(None, pa.float64()), meas.column("value")),
    )
    meas = meas.set_column(
        meas.schema.get_field_index("value_text"),
        "value_text",
        pc.if_else(mask, texts, meas.column("value_text")),
    )
    out["measurements"] = meas
    for name in EVENT_TABLES:
        out[name] = _with_copies(out[name], rng, P_EXTRA_DUPLICATE)
    return out


def _wide(tables: Tables, rng: np.random.Generator) -> Tables:
    out = dict(tables)
    for name in EVENT_TABLES:
        table = tables[name]
        n = table.num_rows
        user = rng.integers(1, 401, n)
        seconds = rng.integers(1_262_304_000, 1_640_995_200, n)  # 2010-01-01 to 2022-01-01
        key = rng.integers(0, 1 << 62, n)
        noted = rng.random(n) < 0.1
        columns = {
            "entered_by": pc.binary_join_element_wise(
                "U", pc.utf8_lpad(pc.cast(pa.array(user), pa.string()), 4, "0"), ""
            ),
            "entered_at": pa.array(seconds, pa.int64()).cast(pa.timestamp("s")),
            "record_key": pc.cast(pa.array(key), pa.string()),
            "free_note": pa.array(
                np.where(noted, "entered from a scanned letter", None), pa.string()
            ),
            "batch_number": pa.array(rng.integers(1, 10_000, n), pa.int32()),
            "interface_version": pa.array(np.full(n, "4.2.1"), pa.string()),
            "audit_flag": pa.array(rng.random(n) < 0.01),
            "site_code": pa.array(np.full(n, "ORV"), pa.string()),
        }
        for column, values in columns.items():
            table = table.append_column(column, values)
        out[name] = table
    return out


_APPLY: dict[str, Callable[[Tables, np.random.Generator], Tables]] = {
    "value_text": _value_text,
    "integer_ids": _integer_ids,
    "many_practices": _many_practices,
    "messy": _messy,
    "wide": _wide,
}


def reshape(tables: Tables, shapes: tuple[str, ...], rng: np.random.Generator) -> Tables:
    """One chunk's tables with ``shapes`` applied in :data:`SHAPES` order.

    ``many_practices`` reads the patient numbers from either id form, so the order of
    ``integer_ids`` does not matter to it. ``rng`` is the chunk's shape stream, separate from
    the draw's, so a shape never moves the default rows.
    """
    for shape in check_shapes(shapes):
        tables = _APPLY[shape](tables, rng)
    return tables
