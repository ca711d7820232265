"""Load study and condition files, reporting every problem with file, line and column."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

from pydantic import ValidationError

from pipeline.config._codelist import HEADER_SUFFIX
from pipeline.config._columns import column_clashes
from pipeline.config._condition import Condition, DiagnosisEvidence, Evidence, Rule, find_cycle
from pipeline.config._document import did_you_mean, validate_document
from pipeline.config._exposure import exposure_problems
from pipeline.config._library import library_conditions
from pipeline.config._listuse import EvidenceLists, ListUse, read_lists
from pipeline.config._localcodes import LocalCodes, load_local_codes
from pipeline.config._matching import matching_problems
from pipeline.config._measure import (
    load_measures,
    measure_files,
    shipped_measures,
)
from pipeline.config._persontime import persontime_problems
from pipeline.config._reference_rates import ReferenceRates
from pipeline.config._reference_use import study_reference_rates
from pipeline.config._study import Study
from pipeline.config._yaml import LocatedDocument, PathKey, load_yaml
from pipeline.errors import ConfigError, Problem
from pipeline.measures import MeasureRegistry


@dataclass(frozen=True)
class Catalog:
    """Every condition definition in a folder, by name, with the file it came from.

    ``code_lists`` holds the code lists each condition's evidence names, read and checked at
    load time: condition name -> evidence name -> the lists.
    """

    folder: Path
    conditions: dict[str, Condition]
    files: dict[str, Path]
    code_lists: dict[str, EvidenceLists] = field(default_factory=dict)

    def get(self, name: str) -> Condition:
        """Return a condition by name (names were checked when the study was loaded)."""
        return self.conditions[name]

    def lists_of(self, condition: str, evidence: str) -> tuple[ListUse, ...]:
        """The code lists one piece of a condition's evidence names (none: empty)."""
        return self.code_lists.get(condition, {}).get(evidence, ())

    def list_files(self, conditions: tuple[str, ...] | None = None) -> list[Path]:
        """Every file the code lists of these conditions (default: all) were read from."""
        names = self.code_lists if conditions is None else conditions
        return sorted(
            {
                file
                for name in names
                for uses in self.code_lists.get(name, {}).values()
                for use in uses
                for file in use.code_list.files
            }
        )

    def with_references(self, names: tuple[str, ...]) -> tuple[str, ...]:
        """``names`` and every condition they refer to, each after those it refers to."""
        ordered: list[str] = []

        def visit(name: str) -> None:
            if name in ordered:
                return
            for ref in self.conditions[name].references:
                visit(ref)
            ordered.append(name)

        for name in names:
            visit(name)
        return tuple(ordered)


def _check_rules(doc: LocatedDocument, condition: Condition) -> list[Problem]:
    problems = []
    for i, rule in enumerate(condition.rules):
        named = [(("rules", i, "need", name), "needs", name) for name in rule.need]
        named += [
            (("rules", i, "absent", j), "requires no", name) for j, name in enumerate(rule.absent)
        ]
        for path, verb, name in named:
            if name not in condition.evidence:
                problems.append(
                    doc.problem(
                        path,
                        "unknown-evidence",
                        f"rule '{rule.name}' {verb} '{name}', which is not defined under "
                        f"evidence{did_you_mean(name, condition.evidence)}",
                    )
                )
    return problems


def _check_references(catalog: dict[str, Condition], files: dict[str, Path]) -> list[Problem]:
    """Every referenced condition exists, and no condition depends on itself."""
    problems = []
    for name, condition in catalog.items():
        for evidence, ev in condition.evidence.items():
            if ev.condition is not None and ev.condition not in catalog:
                doc = load_yaml(files[name])
                problems.append(
                    doc.problem(
                        ("evidence", evidence, "condition"),
                        "unknown-condition",
                        f"evidence '{evidence}' refers to condition '{ev.condition}', which is "
                        f"not defined{did_you_mean(ev.condition, catalog)}",
                        at_value=True,
                    )
                )
    if problems:
        return problems
    reported: set[frozenset[str]] = set()
    for start in sorted(catalog):
        cycle = find_cycle(start, catalog)
        if cycle and frozenset(cycle) not in reported:
            reported.add(frozenset(cycle))
            doc = load_yaml(files[start])
            problems.append(
                doc.problem(
                    ("condition",),
                    "definition-cycle",
                    f"conditions refer to each other in a cycle: {' -> '.join(cycle)}",
                )
            )
    return problems


# Parsed documents standing in for files (resolved path -> document): a sweep's variant is
# its base study and definitions with some values replaced before validation.
Documents = Mapping[Path, LocatedDocument]


def _document(file: Path, documents: Documents | None) -> LocatedDocument:
    """The document given for ``file``, else the file read from disk."""
    given = documents.get(file.resolve()) if documents else None
    return given if given is not None else load_yaml(file)


def load_condition_lists(
    file: Path, measures: MeasureRegistry | None = None, documents: Documents | None = None
) -> tuple[Condition, EvidenceLists]:
    """Load and check one condition file and the code lists its evidence names.

    Thresholds are read against ``measures`` (default: the shipped ones); ``documents`` may
    give the file's parsed content instead of reading it.

    Raises:
        ConfigError: Schema errors, rules that name undefined evidence, code list problems.
    """
    doc = _document(file, documents)
    condition = validate_document(doc, Condition, measures)
    problems = _check_rules(doc, condition)
    lists, list_problems = read_lists(doc, condition)
    problems += list_problems
    if problems:
        raise ConfigError(problems)
    return condition, lists


def load_condition(file: Path, measures: MeasureRegistry | None = None) -> Condition:
    """Load and check one condition file (and its code lists).

    Raises:
        ConfigError: Schema errors, rules that name undefined evidence, code list problems.
    """
    return load_condition_lists(file, measures)[0]


def condition_files(folder: Path) -> list[Path]:
    """The condition files of a folder: its ``*.yaml``, except code list headers."""
    return [f for f in sorted(folder.glob("*.yaml")) if not f.name.endswith(HEADER_SUFFIX)]


def load_catalog(
    folder: Path, measures: MeasureRegistry | None = None, documents: Documents | None = None
) -> Catalog:
    """Load every ``*.yaml`` condition file in a folder; all problems are reported together.

    Thresholds are read against ``measures`` (default: the shipped ones); ``documents`` may
    give some files' parsed content instead of reading them.

    Raises:
        ConfigError: A file is invalid, or two files define the same condition name.
    """
    if not folder.is_dir():
        raise ConfigError(
            [Problem(folder, 0, 0, "missing-folder", "the definitions folder does not exist")]
        )
    conditions: dict[str, Condition] = {}
    files: dict[str, Path] = {}
    code_lists: dict[str, EvidenceLists] = {}
    problems: list[Problem] = []
    for file in condition_files(folder):
        try:
            condition, lists = load_condition_lists(file, measures, documents)
        except ConfigError as err:
            problems.extend(err.problems)
            continue
        if condition.condition in conditions:
            doc = load_yaml(file)
            problems.append(
                doc.problem(
                    ("condition",),
                    "duplicate-condition",
                    f"condition '{condition.condition}' is already defined in "
                    f"{files[condition.condition]}",
                )
            )
            continue
        conditions[condition.condition] = condition
        files[condition.condition] = file
        if lists:
            code_lists[condition.condition] = lists
    problems.extend(_check_references(conditions, files))
    if problems:
        raise ConfigError(problems)
    return Catalog(folder, conditions, files, code_lists)


@dataclass(frozen=True)
class LoadedStudy:
    """A validated study with its catalog; every path in it is absolute.

    Attributes:
        file: The study file.
        study: The study with ``extract``, ``definitions`` and ``output.folder`` resolved
            against the study file's folder.
        catalog: The condition definitions the study may use.
        measures: The measures it may read: shipped, and its own (``measures:``).
        local_codes: The extract's own product and lab test codes (``local_codes:``).
        reference_rates: The table of ``persontime: reference_rates:``, read and checked
            against the study (None without one).
    """

    file: Path
    study: Study
    catalog: Catalog
    measures: MeasureRegistry
    local_codes: LocalCodes = field(default_factory=LocalCodes)
    reference_rates: ReferenceRates | None = None


def _resolve(base: Path, path: Path) -> Path:
    return path if path.is_absolute() else (base / path).resolve()


def _condition_references(study: Study) -> list[tuple[PathKey, str, str]]:
    """Every place a study names a condition: (path, what it is, the name)."""
    found: list[tuple[PathKey, str, str]] = [
        (("outcomes", "conditions", i), "outcome", name)
        for i, name in enumerate(study.outcomes.conditions)
    ]
    for name, cov in study.covariates.items():
        for key in ("condition", "days_since_first_evidence"):
            referred = getattr(cov, key)
            if referred is not None:
                found.append((("covariates", name, key), f"covariate {name}: condition", referred))
    for i, criterion in enumerate(study.eligibility):
        if criterion.not_prevalent is not None:
            path: PathKey = ("eligibility", i, "not_prevalent")
            found.append((path, "condition", criterion.not_prevalent))
    event = study.index.first_event
    if event is not None and event.condition is not None:
        found.append((("index", "first_event", "condition"), "index condition", event.condition))
    found += [
        (("definition_changes", name), "changed condition", name)
        for name in study.definition_changes
    ]
    return found


def _apply_changes(doc: LocatedDocument, study: Study, catalog: Catalog) -> Catalog:
    """The catalog with the study's rule-window changes applied (files stay as they are)."""
    if not study.definition_changes:
        return catalog
    conditions = dict(catalog.conditions)
    problems = []
    for name, changes in study.definition_changes.items():
        condition = conditions[name]
        rules = {rule.name: rule for rule in condition.rules}
        for rule_name in changes:
            if rule_name not in rules:
                problems.append(
                    doc.problem(
                        ("definition_changes", name, rule_name),
                        "unknown-rule",
                        f"condition '{name}' has no rule '{rule_name}'"
                        f"{did_you_mean(rule_name, rules)}",
                    )
                )
        if problems:
            continue
        new_rules = []
        for rule in condition.rules:
            change = changes.get(rule.name)
            update = change.model_dump(exclude_none=True) if change else {}
            try:
                new_rules.append(Rule.model_validate({**rule.model_dump(), **update}))
            except ValidationError as err:
                message = str(err.errors()[0]["msg"]).removeprefix("Value error, ")
                problems.append(
                    doc.problem(("definition_changes", name, rule.name), "bad-value", message)
                )
        conditions[name] = condition.model_copy(update={"rules": tuple(new_rules)})
    if problems:
        raise ConfigError(problems)
    return Catalog(catalog.folder, conditions, catalog.files, catalog.code_lists)


def _study_lists(doc: LocatedDocument, study: Study) -> list[Problem]:
    """Code lists are read in definitions only: a study's own evidence writes its codes inline.

    (Refused rather than ignored, which would silently match nothing.)
    """
    found: list[tuple[PathKey, Evidence | None]] = []
    if study.index.first_event is not None:
        found.append((("index", "first_event", "evidence"), study.index.first_event.evidence))
    for i, criterion in enumerate(study.eligibility):
        if criterion.no_evidence is not None:
            path: PathKey = ("eligibility", i, "no_evidence", "evidence")
            found.append((path, criterion.no_evidence.evidence))
    found += [(("covariates", name, "count"), cov.count) for name, cov in study.covariates.items()]
    groups = study.exposure.groups.items() if study.exposure else ()
    found += [(("exposure", "groups", name), ev) for name, ev in groups]
    problems = []
    for path, ev in found:
        kind = (ev.diagnosis or ev.prescription) if ev is not None else None
        if kind is None:
            continue
        excluded = isinstance(kind, DiagnosisEvidence) and kind.exclude and kind.exclude.lists
        if kind.lists or excluded:
            problems.append(
                doc.problem(
                    path,
                    "list-in-study",
                    "a study's own evidence writes its codes inline; code lists are named in "
                    "definitions (make a definition and refer to it with condition:)",
                )
            )
    return problems


def load_study(file: Path, documents: Documents | None = None) -> LoadedStudy:
    """Load a study file and the condition definitions it refers to.

    ``documents`` (resolved path -> parsed document) stands in for the study file or
    definition files it names, e.g. a sweep's variant of them; other files are read.

    Raises:
        ConfigError: Any schema or cross-reference problem, with file:line:col.
    """
    file = file.resolve()
    doc = _document(file, documents)
    base = file.parent
    measures = _study_measures(doc, base)
    study = validate_document(doc, Study, measures)
    if study.library and "definitions" in doc.data:
        raise ConfigError(
            [
                doc.problem(
                    ("library",),
                    "conflicting-keys",
                    "'library: true' reads the shipped definitions; remove 'definitions' "
                    "(or 'library' to read your own folder)",
                )
            ]
        )
    definitions = library_conditions() if study.library else _resolve(base, study.definitions)
    study = study.model_copy(
        update={
            "extract": study.extract
            if isinstance(study.extract, str)
            else _resolve(base, study.extract),
            "definitions": definitions,
            "output": study.output.model_copy(
                update={"folder": _resolve(base, study.output.folder)}
            ),
        }
    )
    try:
        catalog = load_catalog(study.definitions, measures, documents)
    except ConfigError as err:
        if any(p.code == "missing-folder" for p in err.problems):
            raise ConfigError(
                [
                    doc.problem(
                        ("definitions",),
                        "missing-folder",
                        f"the definitions folder {study.definitions} does not exist (it is "
                        "relative to the study file; 'library: true' instead of 'definitions' "
                        "reads the definitions shipped with ascertain)",
                    )
                ]
            ) from err
        raise
    problems = [
        doc.problem(
            path,
            "unknown-condition",
            f"{what} '{name}' is not defined in {study.definitions}"
            f"{did_you_mean(name, catalog.conditions)}",
            at_value=True,
        )
        for path, what, name in _condition_references(study)
        if name not in catalog.conditions
    ]
    problems += column_clashes(doc, study)
    problems += _study_lists(doc, study)
    ages = [c.age.between[0] for c in study.eligibility if c.age is not None]
    problems += persontime_problems(doc, study.persontime, ages)
    groups = tuple(study.exposure.groups) if study.exposure is not None else None
    problems += matching_problems(doc, study.matching, study.outcomes.conditions, groups)
    problems += exposure_problems(doc, study.exposure, study.index.strategy)
    if problems:
        raise ConfigError(problems)
    study, rates = study_reference_rates(doc, study, base)
    catalog = _apply_changes(doc, study, catalog)
    if problems:
        raise ConfigError(problems)
    local_codes = load_local_codes(doc, study.local_codes, measures)
    return LoadedStudy(file, study, catalog, measures, local_codes, rates)


def _study_measures(doc: LocatedDocument, base: Path) -> MeasureRegistry:
    """The shipped measures and the study's own (``measures:``), read before the study.

    The study's covariates may name its own measures, so they are read first, from the
    document itself; a ``measures`` value of the wrong shape is left to the study's validation
    to report.
    """
    written = doc.data.get("measures") if isinstance(doc.data, dict) else None
    if isinstance(written, str):
        written = [written]
    if not isinstance(written, list) or not all(isinstance(w, str) for w in written):
        return shipped_measures()
    problems = []
    paths = []
    for i, text in enumerate(written):
        path = _resolve(base, Path(text))
        if not path.exists():
            problems.append(
                doc.problem(
                    ("measures", i) if isinstance(doc.data["measures"], list) else ("measures",),
                    "missing-folder",
                    f"the measures folder or file {path} does not exist (it is relative to the "
                    "study file)",
                    at_value=True,
                )
            )
        paths.append(path)
    if problems:
        raise ConfigError(problems)
    return load_measures(measure_files(paths), shipped_measures())
