"""``ascertain sweep``: variants of a study built in one run, compared with the base.

The hand-computed fixture is ``tests/fixtures/sweep_window`` (its README works out every
gained and lost patient); the demo checks are in ``tests/test_sweep_demo.py``.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import pytest

from pipeline.config._sweep import load_sweep
from pipeline.errors import ConfigError, OutputFolderError
from pipeline.workflows.sweep import SweepOptions, run_sweep, write_sweep

FIXTURE = Path(__file__).parent / "fixtures" / "sweep_window"


@pytest.fixture(scope="module")
def window_run():  # type: ignore[no-untyped-def]
    return run_sweep(FIXTURE / "sweep.yaml", SweepOptions(threads=1))


def _row(run, variant: str) -> dict:  # type: ignore[no-untyped-def]
    return next(r for r in run.rows if r["variant"] == variant)


# From the fixture's README, worked out by hand: (prevalent, at risk, incident, gained, lost,
# Jaccard, median onset shift).
BY_HAND = {
    "base": (0, 14, 5, 0, 0, 1.0, 0.0),
    "window_120": (0, 14, 3, 0, 2, 3 / 5, 0.0),
    "window_499": (0, 14, 6, 1, 0, 5 / 6, 0.0),
    "window_730": (1, 13, 7, 2, 0, 5 / 7, 0.0),
}


@pytest.mark.parametrize("variant", sorted(BY_HAND))
def test_hand_computed_window_variants(window_run, variant: str) -> None:  # type: ignore[no-untyped-def]
    row = _row(window_run, variant)
    got = (
        row["prevalent"],
        row["at_risk"],
        row["incident"],
        row["gained"],
        row["lost"],
        row["jaccard"],
        row["median_onset_shift_days"],
    )
    assert row["cohort"] == 14
    assert got[:5] == BY_HAND[variant][:5]
    assert got[5] == pytest.approx(BY_HAND[variant][5])
    assert got[6] == BY_HAND[variant][6]


def test_the_gained_and_lost_patients_are_the_ones_the_readme_names(window_run) -> None:  # type: ignore[no-untyped-def]
    def ids(variant: str, name: str) -> set[str]:
        universe = sorted(
            {p for t in window_run.cohorts.values() for p in t.column("patient_id").to_pylist()}
        )
        return {universe[i] for i in _row(window_run, variant)["sets"][name].values}

    assert ids("window_120", "lost") == {"HY-04", "HY-15"}
    assert ids("window_499", "gained") == {"HY-05"}
    assert ids("window_730", "gained") == {"HY-03", "HY-05"}
    assert ids("window_730", "prevalent") == {"HY-12"}


def test_only_stages_downstream_of_the_window_run_per_variant(window_run) -> None:  # type: ignore[no-untyped-def]
    merged = window_run.merged
    names = {s.name for s in merged.plan.stages}
    assert "evidence_events" in merged.shared
    assert "index_dates" in merged.shared
    for variant in ("window_120", "window_499", "window_730"):
        assert f"rules_heart_failure__{variant}" in names
        assert f"evidence_events__{variant}" not in names
    assert len(merged.plan.stages) < merged.stages_alone


def test_released_table_hides_small_counts_and_what_they_imply(window_run, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    files = write_sweep(window_run, tmp_path / "out")
    assert {f.name for f in files} == {"sweep.csv", "sweep.html"}
    with (tmp_path / "out" / "sweep.csv").open(encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    lost = next(r for r in rows if r["variant"] == "window_120")
    assert lost["lost"] == "<5"
    assert lost["jaccard"] == ""  # made of a hidden count
    for row in rows:
        for name in ("prevalent", "incident"):
            value = row[name]
            assert value in ("0", "*", "<5") or int(value) >= 5
        if row["incident"] in ("*", "<5"):
            assert row["cumulative_incidence"] == row["rate_per_1000py"] == ""
    assert "window_730" in (tmp_path / "out" / "sweep.html").read_text(encoding="utf-8")


def test_a_second_sweep_replaces_its_own_files_and_refuses_foreign_ones(
    window_run, tmp_path: Path
) -> None:  # type: ignore[no-untyped-def]
    out = tmp_path / "out"
    write_sweep(window_run, out)
    first = (out / "sweep.csv").read_bytes()
    write_sweep(window_run, out)
    assert (out / "sweep.csv").read_bytes() == first  # deterministic
    (out / "mine.txt").write_text("keep me", encoding="utf-8")
    with pytest.raises(OutputFolderError):
        write_sweep(window_run, out)
    assert (out / "mine.txt").read_text(encoding="utf-8") == "keep me"


def _sweep(tmp_path: Path, body: str) -> Path:
    file = tmp_path / "sweep.yaml"
    base = (FIXTURE / "study.yaml").resolve()
    file.write_text(f"sweep: s\nbase: {base}\n{body}", encoding="utf-8")
    return file


def _problems(file: Path) -> list[str]:
    with pytest.raises(ConfigError) as err:
        load_sweep(file)
    return [str(p) for p in err.value.problems]


def test_an_unknown_key_is_located_in_the_sweep_file_with_a_suggestion(tmp_path: Path) -> None:
    file = _sweep(tmp_path, "variants:\n  a:\n    study.outcomes.horizon_yeras: 3\n")
    (problem,) = _problems(file)
    assert problem.startswith(f"{file}:5:5 [unknown-key]")
    assert "did you mean 'horizon_years'?" in problem


def test_a_bad_value_and_an_unknown_rule_are_located_at_their_override(tmp_path: Path) -> None:
    body = (
        "variants:\n"
        "  a:\n"
        "    definition.heart_failure.rules.0.within_days: -1\n"
        "  b:\n"
        "    definition.heart_failure.rules.two hf codes.within_days: 3\n"
        "  c:\n"
        "    definition.heart_falure.onset: rule_met\n"
    )
    problems = _problems(_sweep(tmp_path, body))
    assert problems[0].split(" [")[0].endswith(":5:5")
    assert "[bad-value]" in problems[0]
    assert "must be 0 or more" in problems[0]
    assert problems[1].split(" [")[0].endswith(":7:5")
    assert "did you mean 'two heart failure codes'?" in problems[1]
    assert "did you mean 'heart_failure'?" in problems[2]


def test_a_problem_of_a_whole_mapping_names_the_override_and_the_base_place(tmp_path: Path) -> None:
    file = _sweep(tmp_path, "variants:\n  a:\n    study.eligibility.age.between: [90, 40]\n")
    (problem,) = _problems(file)
    assert problem.startswith(f"{file}:5:5 [bad-value]")
    assert "(at study.yaml:" in problem


def test_a_grid_makes_one_variant_per_value_and_names_them(tmp_path: Path) -> None:
    body = (
        "grid:\n"
        "  - key: definition.heart_failure.rules.0.within_days\n"
        "    label: window\n"
        "    values: [180, 1095]\n"
        "  - key: definition.heart_failure.rules.0.need.hf_code\n"
        "    label: need\n"
        "    values: [1, 3]\n"
    )
    sweep = load_sweep(_sweep(tmp_path, body))
    assert [v.name for v in sweep.variants] == [
        "window_180_need_1",
        "window_180_need_3",
        "window_1095_need_1",
        "window_1095_need_3",
    ]
    assert sweep.variants[1].overrides[1].line == 9


def test_a_variant_may_not_be_called_base_nor_be_missing(tmp_path: Path) -> None:
    body = "variants:\n  base:\n    study.outcomes.horizon_years: 3\n"
    assert "[duplicate-variant]" in _problems(_sweep(tmp_path, body))[0]
    assert "[missing-key]" in _problems(_sweep(tmp_path, ""))[0]


def test_an_unknown_kept_variant_is_refused_with_a_suggestion() -> None:
    with pytest.raises(ConfigError, match="did you mean 'window_120'"):
        run_sweep(FIXTURE / "sweep.yaml", SweepOptions(keep=("window_12",)))


def test_statistics_are_those_of_the_stats_package(window_run) -> None:  # type: ignore[no-untyped-def]
    # A rate with no events is 0 with a finite upper limit (exact Poisson), never NaN.
    for row in window_run.rows:
        assert row["rate_per_1000py"] >= 0
        assert not math.isnan(row["rate_high"])
        assert 0 <= row["cumulative_incidence"] <= 1


def test_the_command_writes_the_sweep_and_a_verifiable_kept_variant(tmp_path: Path) -> None:
    from typer.testing import CliRunner

    from pipeline import verify_output
    from pipeline.cli import app

    out = tmp_path / "out"
    args = ["sweep", str(FIXTURE / "sweep.yaml"), "--out", str(out), "--keep", "window_730"]
    result = CliRunner().invoke(app, [*args, "--quiet", "--threads", "1"])
    assert result.exit_code == 0, result.output
    assert "ran " in result.output
    assert "shared" in result.output
    assert (out / "keep" / "window_730" / "manifest.json").is_file()
    assert "within_days: 730" in (out / "variants" / "window_730" / "study.yaml").read_text(
        encoding="utf-8"
    )
    assert verify_output(out / "keep" / "window_730").identical


def test_the_command_reports_a_bad_sweep_file_at_its_line(tmp_path: Path) -> None:
    from typer.testing import CliRunner

    from pipeline.cli import app

    file = _sweep(tmp_path, "variants:\n  a:\n    study.outcomes.horizon_yeras: 3\n")
    result = CliRunner().invoke(app, ["sweep", str(file), "--out", str(tmp_path / "o")])
    assert result.exit_code == 2
    assert "sweep.yaml:5:5 [unknown-key]" in result.output.replace("\n", "")
    assert not (tmp_path / "o").exists()


def test_check_checks_a_sweep_file_with_its_variants(tmp_path: Path) -> None:
    from pipeline.config._check import check_paths

    assert not check_paths([FIXTURE / "sweep.yaml"]).problems
    file = _sweep(tmp_path, "variants:\n  a:\n    study.outcomes.horizon_yeras: 3\n")
    (problem,) = check_paths([file]).problems
    assert problem.code == "unknown-key"
    assert problem.line == 5


def test_a_variant_a_build_would_refuse_fails_the_sweep_naming_it(tmp_path: Path) -> None:
    from pipeline.errors import UnusableBuildError
    from pipeline.workflows.build import BuildOptions, build_study
    from pipeline.workflows.sweep import write_variant_inputs

    # No encounter of the fixture falls in 1990, so this variant's cohort is empty; the study
    # does not allow an empty cohort (outputs/_usability.py).
    file = _sweep(
        tmp_path,
        "variants:\n  too_early:\n"
        "    study.index.first_encounter.between: [1990-01-01, 1990-12-31]\n",
    )
    with pytest.raises(UnusableBuildError) as swept:
        run_sweep(file, SweepOptions(threads=1))
    assert str(swept.value).startswith("variant 'too_early': the cohort is empty")
    sweep = load_sweep(file)
    study = write_variant_inputs(
        sweep, sweep.variant("too_early"), tmp_path / "v", tmp_path / "v" / "out"
    )
    with pytest.raises(UnusableBuildError) as built:
        build_study(study, BuildOptions(threads=1))
    assert str(built.value) == str(swept.value).removeprefix("variant 'too_early': ")
    assert not (tmp_path / "v" / "out").exists()


def test_a_failed_check_stage_names_the_variants_that_run_it(window_run) -> None:  # type: ignore[no-untyped-def]
    from pipeline.errors import EngineError
    from pipeline.workflows.sweep import _naming_variants

    merged = window_run.merged
    own = next(n for n in merged.names["window_120"].values() if n.endswith("__window_120"))
    # The engine names a failing stage as where="stage <name>" (engine/base.py).
    where = f"stage {own}"
    err = _naming_variants(EngineError("3 rows", code="data-check-failed", where=where), merged)
    assert err.code == "data-check-failed"
    assert str(err) == f"stage {own} [data-check-failed] 3 rows (stage of window_120)"
    shared = merged.names["base"]["patient_base"]
    where = f"stage {shared}"
    err = _naming_variants(EngineError("3 rows", code="data-check-failed", where=where), merged)
    assert str(err).endswith("(stage of every variant)")


def test_the_sweep_folder_may_not_lie_inside_the_extract() -> None:
    from pipeline.workflows.sweep import check_sweep_folder

    extract = (FIXTURE / "../designs/horizon_years").resolve()
    with pytest.raises(OutputFolderError, match="extract"):
        check_sweep_folder(FIXTURE / "sweep.yaml", extract / "sweep_out")
    assert not (extract / "sweep_out").exists()


@pytest.fixture(scope="module")
def kept_sweep(tmp_path_factory: pytest.TempPathFactory) -> Path:
    from typer.testing import CliRunner

    from pipeline.cli import app

    out = tmp_path_factory.mktemp("kept") / "out"
    args = ["sweep", str(FIXTURE / "sweep.yaml"), "--out", str(out), "--quiet", "--threads", "1"]
    result = CliRunner().invoke(app, [*args, "--keep", "base", "--keep", "window_730"])
    assert result.exit_code == 0, result.output
    return out


def _csv(path: Path) -> list[dict[str, str]]:
    with path.open(encoding="utf-8", newline="") as handle:
        return list(csv.DictReader(handle))


def _section(html: str) -> str:
    start = html.index('<section id="sweep">')
    return html[start : html.index("</section>", start)]


@pytest.mark.parametrize("kept", ["base", "window_730"])
def test_a_kept_variants_report_carries_the_sweep_section(kept_sweep: Path, kept: str) -> None:
    import re

    folder = kept_sweep / "keep" / kept
    html = (folder / "report.html").read_text(encoding="utf-8")
    section = _section(html)
    assert '<a href="#sweep">Definition sensitivity</a>' in html  # in the report's contents
    assert section.count("<svg") == 1  # one plot per outcome: the fixture compares one
    assert f"{kept} (this report)" in section
    released = _csv(kept_sweep / "sweep.csv")
    # The section's count cells are the released table's, hidden counts marked as the report
    # marks them (<5 or *, in class="n" cells).
    cells = re.findall(r'<td class="num n">([^<]*)</td>', section)
    counts = ("cohort", "prevalent", "at_risk", "incident", "gained", "lost")
    assert [c.replace("&lt;", "<") for c in cells] == [r[c] for r in released for c in counts]
    assert any(c in ("*", "&lt;5") for c in cells)
    summary = _csv(folder / "summary" / "sweep.csv")
    assert [[r[c] for c in counts] for r in summary] == [[r[c] for c in counts] for r in released]


@pytest.mark.parametrize("kept", ["base", "window_730"])
def test_counts_printed_in_the_report_and_the_sweep_are_hidden_alike(
    kept_sweep: Path, kept: str
) -> None:
    # One linked system: the same patients counted in the report's incidence table and flow
    # and in the sweep's row of that variant are shown (or hidden) alike.
    folder = kept_sweep / "keep" / kept
    (incidence,) = _csv(folder / "summary" / "incidence.csv")
    row = next(r for r in _csv(kept_sweep / "sweep.csv") if r["variant"] == kept)
    assert (row["at_risk"], row["incident"]) == (incidence["at_risk"], incidence["events"])
    assert row["cohort"] == _csv(folder / "summary" / "flow.csv")[-1]["remaining"]
    assert "cohort.parquet" in {p.name for p in folder.iterdir()}


def test_the_sweep_page_is_the_report_section_in_the_report_chrome(kept_sweep: Path) -> None:
    from pipeline.outputs.report._html import CSS

    page = (kept_sweep / "sweep.html").read_text(encoding="utf-8")
    kept = (kept_sweep / "keep" / "base" / "report.html").read_text(encoding="utf-8")
    assert CSS in page
    assert 'id="cautions"' in page
    assert _section(page) == _section(kept).replace(" (this report)", "")


def test_the_section_draws_one_plot_per_outcome_and_no_point_for_a_hidden_count() -> None:
    from pipeline.outputs.report._sweep import SweepFacts, sweep_section

    def row(variant: str, outcome: str, incident: str, ci: float | None) -> dict:  # type: ignore[type-arg]
        counts = {"cohort": 40, "prevalent": 0, "at_risk": 40, "incident": incident}
        counts |= {"gained": None, "lost": None}
        stats = dict.fromkeys(("ci_low", "rate_per_1000py", "rate_low", "rate_high"), ci)
        return {
            "variant": variant,
            "is_base": "yes" if variant == "base" else "no",
            "outcome": outcome,
            **counts,
            **stats,
            "cumulative_incidence": ci,
            "ci_high": None if ci is None else ci + 0.1,
            "jaccard": None,
            "median_onset_shift_days": None,
        }

    released = [
        row("base", "ckd", "12", 0.3),
        row("wide", "ckd", "<5", None),
        row("base", "heart_failure", "9", 0.2),
        row("wide", "heart_failure", "*", None),
    ]
    facts = SweepFacts("s", "S", "study.yaml", (("wide", ("a = 1",)),), 3, 6, 2, {})
    html = sweep_section(facts, released, 5)
    assert html.count("<svg") == 2
    assert html.count('<rect class="dot"') == 2  # the base's point, a square, per outcome
    assert "<circle" not in html  # the variant's hidden estimates are not drawn
    assert html.count("not shown (hidden count)") == 2
    assert '<td class="num n">&lt;5</td>' in html
    assert '<td class="num n">*</td>' in html


def test_the_sweep_and_the_kept_reports_are_safe_read_together(
    kept_sweep: Path, window_run
) -> None:  # type: ignore[no-untyped-def]
    # A reader holding sweep.csv and the kept reports writes down the sweep's identities (as in
    # test_sweep_demo) and, per kept report, its incidence table's (events + non-events = at
    # risk) and the twins: the report's at risk and events are the sweep row's. No hidden count
    # of either may be narrowed below the threshold (5, the fixture's study).
    from pipeline.stats._disclosure import feasible_range
    from pipeline.workflows._sweep_numbers import COUNTS

    from .test_sweep_demo import _reader_system

    released = _csv(kept_sweep / "sweep.csv")
    for row in released:
        for key in COUNTS:
            row[key] = row[key] or None
    values, relations, unknown, _ = _reader_system(released, window_run.rows)
    hidden = [
        f"{k}|{r['variant']}" + ("" if k == "cohort" else f"|{r['outcome']}")
        for r in released
        for k in COUNTS
        if r[k] in ("*", "<5")
    ]
    truth = {(r["variant"], r["outcome"]): r for r in window_run.rows}
    for kept in ("base", "window_730"):
        for shown in _csv(kept_sweep / "keep" / kept / "summary" / "incidence.csv"):
            o, exact = shown["outcome"], truth[(kept, shown["outcome"])]
            cells = {
                "at_risk": (exact["at_risk"], shown["at_risk"]),
                "events": (exact["incident"], shown["events"]),
                "nonevents": (exact["at_risk"] - exact["incident"], None),
            }
            for name, (value, text) in cells.items():
                values[f"report|{name}|{kept}|{o}"] = value
                if text is None or text in ("*", "<5"):
                    unknown.add(f"report|{name}|{kept}|{o}")
                    if text is not None:
                        hidden.append(f"report|{name}|{kept}|{o}")
            relations += [
                (
                    (f"report|events|{kept}|{o}", 1),
                    (f"report|nonevents|{kept}|{o}", 1),
                    (f"report|at_risk|{kept}|{o}", -1),
                ),
                ((f"at_risk|{kept}|{o}", 1), (f"report|at_risk|{kept}|{o}", -1)),
                ((f"incident|{kept}|{o}", 1), (f"report|events|{kept}|{o}", -1)),
            ]
    assert any(h.startswith("report|") for h in hidden)  # the check is not empty
    for name in sorted(set(hidden)):
        low, high = feasible_range(name, values, relations, unknown)
        assert high - low >= 5, (name, low, high)
