"""Extract shapes (``ascertain synth --shape``): each changes what it says and nothing else."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.synth import Scenario, generate_extract
from pipeline.synth._shapes import EVENT_TABLES, PRACTICES, SHAPES, UNREADABLE_TEXTS
from pipeline.workflows.build import BuildOptions, build_study

from .conftest import DEMO_STUDY, ROOT

N = 1500
SEED = 5
SMALL_CHUNKS = Scenario(chunk_size=600)  # three chunks: each gets its own shape stream
TABLES = ("patients", *EVENT_TABLES, "truth")


def _read(folder: Path, table: str) -> pa.Table:
    return pq.read_table(folder / f"{table}.parquet")


@pytest.fixture(scope="module")
def extracts(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    root = tmp_path_factory.mktemp("shapes")
    out = {}
    for shape in ("base", *SHAPES):
        out[shape] = root / shape
        shapes = () if shape == "base" else (shape,)
        generate_extract(out[shape], patients=N, seed=SEED, scenario=SMALL_CHUNKS, shapes=shapes)
    return out


def test_default_shape_rewrites_the_committed_demo_extract(tmp_path: Path) -> None:
    """The demo extract's README gives its command; running it again gives the same bytes."""
    committed = ROOT / "synthetic_extract"
    scenario = json.loads((committed / "scenario.json").read_text(encoding="utf-8"))
    generate_extract(tmp_path / "x", patients=scenario["patients"], seed=scenario["seed"])
    for name in [*(f"{t}.parquet" for t in TABLES), "scenario.json"]:
        ours = hashlib.sha256((tmp_path / "x" / name).read_bytes()).hexdigest()
        assert ours == hashlib.sha256((committed / name).read_bytes()).hexdigest(), name


def test_scenario_json_lists_the_shapes(extracts: dict[str, Path]) -> None:
    base = json.loads((extracts["base"] / "scenario.json").read_text(encoding="utf-8"))
    wide = json.loads((extracts["wide"] / "scenario.json").read_text(encoding="utf-8"))
    assert "shapes" not in base
    assert wide["shapes"] == {"wide": SHAPES["wide"]}


def test_value_text_carries_every_numeric_value(extracts: dict[str, Path]) -> None:
    base = _read(extracts["base"], "measurements")
    shaped = _read(extracts["value_text"], "measurements")
    assert shaped.drop(["value_text"]).equals(base.drop(["value_text"]))
    value = shaped.column("value").to_pylist()
    text = shaped.column("value_text").to_pylist()
    old = base.column("value_text").to_pylist()
    with_value = [(v, t) for v, t in zip(value, text, strict=True) if v is not None]
    assert with_value
    assert all(t is not None and float(t) == v for v, t in with_value)
    # Whole numbers are written as a system prints them: "120", not "120.0".
    assert any(t == "120" for v, t in with_value if v == 120.0)
    assert all(t == o for v, t, o in zip(value, text, old, strict=True) if v is None)


def test_integer_ids_are_the_patient_numbers(extracts: dict[str, Path]) -> None:
    for table in TABLES:
        base = _read(extracts["base"], table)
        shaped = _read(extracts["integer_ids"], table)
        assert shaped.schema.field("patient_id").type == pa.int64()
        numbers = [int(i.removeprefix("OB-")) for i in base.column("patient_id").to_pylist()]
        assert shaped.column("patient_id").to_pylist() == numbers
        assert shaped.drop(["patient_id"]).equals(base.drop(["patient_id"]))


def test_many_practices_split_each_practice(extracts: dict[str, Path]) -> None:
    base = _read(extracts["base"], "patients")
    shaped = _read(extracts["many_practices"], "patients")
    assert shaped.drop(["practice_id"]).equals(base.drop(["practice_id"]))
    pairs = set(
        zip(
            base.column("practice_id").to_pylist(),
            shaped.column("practice_id").to_pylist(),
            strict=True,
        )
    )
    new = {n for _, n in pairs}
    assert all(len(n) == 4 and n.startswith("P") and 1 <= int(n[1:]) <= PRACTICES for n in new)
    assert len(new) > 0.6 * PRACTICES  # 1,500 patients spread over most of the 800
    assert len(pairs) == len(new)  # each new practice lies inside one old practice


def test_messy_adds_duplicates_and_unreadable_values(extracts: dict[str, Path]) -> None:
    for table in EVENT_TABLES:
        base, shaped = _read(extracts["base"], table), _read(extracts["messy"], table)
        extra = shaped.num_rows / base.num_rows - 1
        assert 0.04 < extra < 0.06, (table, extra)
    meas = _read(extracts["messy"], "measurements")
    unreadable = pc.is_in(meas.column("value_text"), pa.array(UNREADABLE_TEXTS))
    share = pc.sum(unreadable).as_py() / meas.num_rows
    assert 0.02 < share < 0.04
    assert pc.all(pc.is_null(pc.filter(meas.column("value"), unreadable))).as_py()


def test_wide_adds_columns_and_keeps_the_canonical_ones(extracts: dict[str, Path]) -> None:
    for table in EVENT_TABLES:
        base, shaped = _read(extracts["base"], table), _read(extracts["wide"], table)
        assert shaped.num_columns == base.num_columns + 8
        assert shaped.select(base.column_names).equals(base)
        assert shaped.column("record_key").null_count == 0


@pytest.mark.slow
def test_the_demo_study_builds_on_every_shape(extracts: dict[str, Path], tmp_path: Path) -> None:
    """Shapes that change only the form of the rows give the base shape's cohort."""
    cohorts = {}
    for shape, folder in extracts.items():
        result = build_study(DEMO_STUDY, BuildOptions(extract=folder, out=tmp_path / shape))
        cohorts[shape] = result.read("cohort")
    base = cohorts["base"]
    assert base.num_rows > 300
    for shape in ("value_text", "many_practices", "wide"):
        assert cohorts[shape].equals(base), shape
    ids = cohorts["integer_ids"]
    assert ids.schema.field("patient_id").type == pa.int64()
    assert ids.drop(["patient_id"]).equals(base.drop(["patient_id"]))
    numbers = [int(i.removeprefix("OB-")) for i in base.column("patient_id").to_pylist()]
    assert ids.column("patient_id").to_pylist() == numbers
    # Messy data loses some evidence and counts more rows set aside, but still builds.
    assert abs(cohorts["messy"].num_rows - base.num_rows) < 0.1 * base.num_rows
    np.testing.assert_array_equal(
        np.unique(cohorts["messy"].column("patient_id").to_numpy(zero_copy_only=False)).size,
        cohorts["messy"].num_rows,
    )


def test_cli_refuses_an_unknown_shape(tmp_path: Path) -> None:
    result = CliRunner().invoke(
        app, ["synth", str(tmp_path / "x"), "--patients", "10", "--shape", "tall"]
    )
    assert result.exit_code != 0
    assert "unknown extract shape 'tall'" in result.output
    assert "value_text" in result.output
    assert not (tmp_path / "x").exists()


def test_shapes_are_refused_for_fhir(tmp_path: Path) -> None:
    result = CliRunner().invoke(
        app,
        ["synth", str(tmp_path / "x"), "--patients", "10", "--format", "fhir", "--shape", "wide"],
    )
    assert result.exit_code != 0
    assert "not to FHIR" in result.output
