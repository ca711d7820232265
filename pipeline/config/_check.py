"""``ascertain check``: validate definition and study files without data, and explain them.

Beyond what loading already rejects, the checks here find definitions that load but are
probably not what their author meant: evidence no rule uses, exclusions that remove nothing,
inclusions an exclusion cancels.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path

from pipeline.codes import SYSTEM_NAMES, expand_codes
from pipeline.config._codelist import HEADER_SUFFIX, CodeList, load_code_list
from pipeline.config._condition import Condition, Evidence, Rule
from pipeline.config._editions import edition_problems
from pipeline.config._listuse import EvidenceLists, ListUse
from pipeline.config._loader import load_catalog, load_condition_lists, load_study
from pipeline.config._measure import load_measures, shipped_measures
from pipeline.config._plausible import condition_warnings, study_warnings
from pipeline.config._study import Study
from pipeline.config._sweep import load_sweep
from pipeline.config._yaml import load_yaml
from pipeline.errors import ConfigError, Problem
from pipeline.measures import MeasureRegistry

UNREADABLE = frozenset({"unreadable", "bad-yaml", "empty-file", "missing-folder", "not-found"})


@dataclass
class CheckReport:
    """Problems found, files checked, and the definitions and studies that loaded.

    The loaded ones are kept for ``--explain``. ``warnings`` are things that load but are
    probably a slip (a threshold no plausible value can meet); they do not change the exit
    code.
    """

    problems: list[Problem] = field(default_factory=list)
    warnings: list[Problem] = field(default_factory=list)
    files: list[Path] = field(default_factory=list)
    conditions: dict[Path, Condition] = field(default_factory=dict)
    lists: dict[Path, EvidenceLists] = field(default_factory=dict)
    studies: dict[Path, Study] = field(default_factory=dict)

    @property
    def exit_code(self) -> int:
        """0 when clean, 2 when a file could not be read at all, else 1."""
        if any(p.code in UNREADABLE for p in self.problems):
            return 2
        return 1 if self.problems else 0


def _yaml_files(paths: list[Path]) -> tuple[list[Path], list[Problem]]:
    files: list[Path] = []
    missing: list[Problem] = []
    for path in paths:
        if path.is_dir():
            files.extend(sorted(path.rglob("*.yaml")))
        elif path.is_file():
            files.append(path)
        else:
            missing.append(Problem(path, 0, 0, "not-found", "no such file or folder"))
    return sorted(set(files)), missing


def _kind(file: Path) -> str:
    """``study``, ``measure``, ``sweep`` or (the default, reporting any problem) ``condition``."""
    try:
        data = load_yaml(file).data
    except ConfigError:
        return "condition"
    if isinstance(data, dict):
        for kind in ("study", "measure", "sweep"):
            if kind in data and "condition" not in data:
                return kind
    return "condition"


def _measures(files: list[Path], report: CheckReport) -> MeasureRegistry:
    """The shipped measures and the measure files among the checked ones."""
    try:
        return load_measures(files, shipped_measures())
    except ConfigError as err:
        report.problems.extend(err.problems)
        return shipped_measures()


def _lint(file: Path, condition: Condition) -> list[Problem]:
    doc = load_yaml(file)
    used = {name for rule in condition.rules for name in (*rule.need, *rule.absent)}
    problems = []
    if condition.provenance is None:
        problems.append(
            doc.problem(
                ("condition",),
                "no-provenance",
                f"definition '{condition.condition}' has no provenance: say which published "
                "algorithm it adapts (or that it is our own), its ICD edition, version and date",
            )
        )
    problems += [
        doc.problem(
            ("evidence", name),
            "unused-evidence",
            f"evidence '{name}' is defined but no rule uses it",
        )
        for name in condition.evidence
        if name not in used
    ]
    for name, ev in condition.evidence.items():
        for system, included, excluded, path in _code_lists(ev):
            include = expand_codes(included)
            for prefix in expand_codes(excluded):
                if not any(prefix.startswith(i) for i in include):
                    problems.append(
                        doc.problem(
                            ("evidence", name, *path),
                            "exclude-unused",
                            f"evidence '{name}': excluded {system} '{prefix}' is not inside any "
                            "included code, so it removes nothing",
                        )
                    )
                cancelled = [i for i in include if i.startswith(prefix)]
                if cancelled:
                    problems.append(
                        doc.problem(
                            ("evidence", name, *path),
                            "include-excluded",
                            f"evidence '{name}': {system} '{', '.join(cancelled)}' is included "
                            f"and excluded by '{prefix}', so it matches nothing",
                        )
                    )
    return problems


def _code_lists(
    ev: Evidence,
) -> list[tuple[str, tuple[str, ...], tuple[str, ...], tuple[str, ...]]]:
    if ev.diagnosis and ev.diagnosis.exclude:
        exclude = ev.diagnosis.exclude
        return [
            ("ICD9", ev.diagnosis.ICD9, exclude.ICD9, ("diagnosis", "exclude")),
            ("ICD10", ev.diagnosis.ICD10, exclude.ICD10, ("diagnosis", "exclude")),
        ]
    if ev.prescription and ev.prescription.exclude:
        return [("ATC", ev.prescription.atc, ev.prescription.exclude, ("prescription", "exclude"))]
    return []


def check_paths(paths: list[Path]) -> CheckReport:
    """Check every YAML file under ``paths``: studies, definitions and their folders."""
    files, problems = _yaml_files(paths)
    report = CheckReport(problems=problems, files=files)
    kinds = {file: _kind(file) for file in files}
    measures = _measures([f for f in files if kinds[f] == "measure"], report)
    folders: set[Path] = set()
    checked = {file.resolve() for file in files}
    code_lists: list[CodeList] = []  # every list read, for the edition check
    for file in files:
        try:
            if file.name.endswith(HEADER_SUFFIX):
                code_lists.append(load_code_list(file))
                continue
            if kinds[file] == "study":
                loaded = load_study(file)
                report.studies[file] = loaded.study
                code_lists += _lists_of(loaded.catalog.code_lists.values())
                report.warnings += study_warnings(file, loaded.study, loaded.measures)
                for name, condition_file in loaded.catalog.files.items():
                    if condition_file.resolve() in checked:
                        continue  # warned about below, under the name it was given
                    condition = loaded.catalog.get(name)
                    report.warnings += condition_warnings(
                        condition_file, condition, loaded.measures
                    )
                continue
            if kinds[file] == "measure":
                continue
            if kinds[file] == "sweep":
                load_sweep(file)  # the base study and every variant, checked as studies
                continue
            condition, lists = load_condition_lists(file, measures)
        except ConfigError as err:
            report.problems.extend(err.problems)
            continue
        report.conditions[file] = condition
        report.lists[file] = lists
        code_lists += _lists_of([lists])
        report.problems.extend(_lint(file, condition))
        report.warnings += condition_warnings(file, condition, measures)
        folders.add(file.parent)
    for folder in sorted(folders):
        try:
            load_catalog(folder, measures)
        except ConfigError as err:
            known = set(report.problems)
            report.problems.extend(p for p in err.problems if p not in known)
    report.problems += edition_problems(code_lists)
    report.problems = sorted(set(report.problems))
    report.warnings = sorted(set(report.warnings))
    return report


def _lists_of(evidence_lists: Iterable[EvidenceLists]) -> list[CodeList]:
    """The lists named by some definitions' evidence."""
    return [use.code_list for lists in evidence_lists for uses in lists.values() for use in uses]


def _list_text(use: ListUse) -> str:
    code_list = use.code_list
    how = "starting" if code_list.match == "prefix" else "equal to"
    system = SYSTEM_NAMES[code_list.system]
    article = "an" if system[0] in "AEIOU" else "a"
    text = (
        f"{article} {system} code {how} {' or '.join(code_list.included())} "
        f"(list {code_list.name}, edition {code_list.edition}"
    )
    if code_list.excluded():
        text += f"; except {', '.join(code_list.excluded())}"
    return text + ")"


def _codes_text(ev: Evidence, uses: tuple[ListUse, ...] = ()) -> str:
    included = [u for u in uses if not u.excluded]
    excluded_lists = [u.code_list.name for u in uses if u.excluded]
    if ev.diagnosis:
        parts = [
            f"an {label} code starting {' or '.join(codes)}"
            for label, codes in (("ICD-10", ev.diagnosis.ICD10), ("ICD-9", ev.diagnosis.ICD9))
            if codes
        ] + [_list_text(u) for u in included]
        text = "a diagnosis with " + " or ".join(parts)
        if ev.diagnosis.exclude:
            excluded = [*ev.diagnosis.exclude.ICD10, *ev.diagnosis.exclude.ICD9]
            excluded += [f"the codes of list {name}" for name in excluded_lists]
            text += f", except {', '.join(excluded)}"
        if ev.diagnosis.source:
            text += f", recorded in {' or '.join(s.replace('_', ' ') for s in ev.diagnosis.source)}"
        return text
    if ev.prescription:
        rx = ev.prescription
        parts = [f"an ATC code starting {' or '.join(rx.atc)}"] if rx.atc else []
        text = "a prescription with " + " or ".join(parts + [_list_text(u) for u in included])
        if rx.exclude:
            text += f", except {', '.join(rx.exclude)}"
        if rx.min_days:
            text += f", lasting at least {rx.min_days} days"
        return text
    if ev.measurement:
        m = ev.measurement
        if m.category:
            return f"a measurement of {m.measure} recorded as {' or '.join(m.category)}"
        limits = [
            f"{label} {value}"
            for label, value in (
                ("at least", m.at_least),
                ("above", m.above),
                ("below", m.below),
                ("at most", m.at_most),
            )
            if value is not None
        ]
        if m.between:
            limits.append(f"between {m.between[0]} and {m.between[1]}")
        return f"a measurement of {m.measure} {' and '.join(limits)}"
    if ev.encounter:
        if not ev.encounter.type:
            return "an encounter of any type"
        return f"an encounter of type {' or '.join(ev.encounter.type)}"
    return f"the onset of {ev.condition}"


def _rule_text(rule: Rule) -> str:
    needs = " and ".join(f"{count} {name}" for name, count in rule.need.items())
    text = f"rule '{rule.name}': {needs} event{'s' if sum(rule.need.values()) > 1 else ''}"
    if rule.distinct_days:
        text += " on distinct days"
    if rule.apart_at_least_days is not None:
        text += f" at least {rule.apart_at_least_days} days apart"
    if rule.within_days is not None:
        text += f" within {rule.within_days} days of each other"
    if rule.absent:
        text += f", with no {' or '.join(rule.absent)} {_absent_window_text(rule)}"
    return text


def _absent_window_text(rule: Rule) -> str:
    if rule.absent_window is None:
        return "ever"
    start, end = rule.absent_window

    def offset(days: int | None, open_end: str) -> str:
        if days is None:
            return open_end
        if days == 0:
            return "the day it is met"
        return f"{abs(days)} days {'before' if days < 0 else 'after'} the day it is met"

    return (
        f"from {offset(start, 'the start of the record')} to {offset(end, 'the end of the record')}"
    )


def explain_condition(condition: Condition, lists: EvidenceLists | None = None) -> str:
    """One plain paragraph saying what a definition means (with its code lists, if given).

    >>> from pipeline.config import Condition
    >>> c = Condition.model_validate({"condition": "x", "title": "X", "about": "a",
    ...     "evidence": {"code": {"diagnosis": {"ICD10": ["I50"]}}},
    ...     "rules": [{"name": "one code", "need": {"code": 1}}]})
    >>> print(explain_condition(c))
    X (x): a patient is a case from the earliest date on which any rule is met: rule 'one code': 1 code event. Evidence: code is a diagnosis with an ICD-10 code starting I50. Onset: the date the first rule is met.
    """  # noqa: E501
    rules = "; ".join(_rule_text(r) for r in condition.rules)
    lists = lists or {}
    evidence = "; ".join(
        f"{name} is {_codes_text(ev, lists.get(name, ()))}"
        for name, ev in condition.evidence.items()
    )
    onset = (
        "the date the first rule is met"
        if condition.onset == "rule_met"
        else (
            "the earliest evidence of the sets of events that first met a rule (all such "
            "sets that day)"
        )
    )
    return (
        f"{condition.title} ({condition.condition}): a patient is a case from the earliest date "
        f"on which any rule is met: {rules}. Evidence: {evidence}. Onset: {onset}."
    )
