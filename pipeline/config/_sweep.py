"""Sweep files: a base study and named variants of it, each a set of overridden keys.

A variant is its base study and definition files with some values replaced *before*
validation, so a variant is checked by exactly the rules a study file is, and a problem with
a replaced value is reported at the line of the sweep file that wrote it.

An override names its target with a dotted path: ``study.outcomes.horizon_days`` for a key
of the base study, ``definition.heart_failure.rules.0.within_days`` for a key of a condition
the study reads. A list item is chosen by its position (``rules.0``), by its ``name``
(``rules.two heart failure codes``), or by the one key it holds (``eligibility.age``).
"""

from __future__ import annotations

import copy
import itertools
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any

from pydantic import Field

from pipeline.config._base import ONE_OR_MORE, Model, Name
from pipeline.config._document import did_you_mean, validate_document
from pipeline.config._loader import LoadedStudy, load_study
from pipeline.config._yaml import LocatedDocument, PathKey, load_yaml
from pipeline.errors import ConfigError, Problem

BASE = "base"
"""The name the base study goes by in a sweep's outputs; no variant may take it."""

TARGETS = ("study", "definition")


class GridAxis(Model):
    """One key of a grid and the values it takes; each value makes a variant."""

    key: str = Field(min_length=1)
    values: tuple[Any, ...] = Field(min_length=1)
    label: Name


class SweepFile(Model):
    """The YAML shape of a sweep file."""

    sweep: Name
    title: str | None = None
    base: Path
    outcomes: Annotated[tuple[Name, ...], ONE_OR_MORE] = ()
    variants: dict[Name, dict[str, Any]] = Field(default_factory=dict)
    grid: tuple[GridAxis, ...] = Field(default=(), max_length=2)


@dataclass(frozen=True)
class Override:
    """One replaced value: its dotted target, the value, where the sweep file writes it."""

    target: str
    value: Any
    line: int
    column: int


@dataclass(frozen=True)
class Variant:
    """A named set of overrides of the base study and its definitions."""

    name: str
    overrides: tuple[Override, ...]


@dataclass(frozen=True)
class Sweep:
    """A loaded sweep file: the base study (already loaded) and its checked variants.

    Attributes:
        file: The sweep file.
        name: The sweep's name.
        title: Its title (the base study's when the file gives none).
        base: The base study, loaded.
        outcomes: The outcomes to compare (default: every outcome of the base).
        variants: The variants, in the order the file writes them (grid last).
    """

    file: Path
    name: str
    title: str
    base: LoadedStudy
    outcomes: tuple[str, ...]
    variants: tuple[Variant, ...]

    def variant(self, name: str) -> Variant:
        """Return a variant by name.

        Raises:
            ConfigError: No variant has that name (with a suggestion).
        """
        for variant in self.variants:
            if variant.name == name:
                return variant
        names = [v.name for v in self.variants]
        message = f"the sweep has no variant '{name}'{did_you_mean(name, names)}"
        raise ConfigError([Problem(self.file, 0, 0, "unknown-variant", message)])


def _grid_name(axes: tuple[GridAxis, ...], values: tuple[Any, ...]) -> str:
    parts = [f"{axis.label}_{value}" for axis, value in zip(axes, values, strict=True)]
    return re.sub(r"[^a-z0-9_]+", "_", "_".join(parts).lower()).strip("_")[:48]


def _variants(doc: LocatedDocument, spec: SweepFile) -> list[Variant]:
    """The written variants, then one per grid point, with the positions of their values."""
    found = []
    for name, overrides in spec.variants.items():
        found.append(
            Variant(
                name,
                tuple(
                    Override(target, value, *doc.locate(("variants", name, target)))
                    for target, value in overrides.items()
                ),
            )
        )
    ranges = [list(enumerate(axis.values)) for axis in spec.grid]
    for point in itertools.product(*ranges) if ranges else ():
        overrides = tuple(
            Override(axis.key, value, *doc.locate(("grid", i, "values", j), at_value=True))
            for i, (axis, (j, value)) in enumerate(zip(spec.grid, point, strict=True))
        )
        found.append(Variant(_grid_name(spec.grid, tuple(v for _, v in point)), overrides))
    return found


def _name_problems(doc: LocatedDocument, variants: list[Variant]) -> list[Problem]:
    problems, seen = [], set()
    for variant in variants:
        if variant.name == BASE or variant.name in seen:
            where = variant.overrides[0] if variant.overrides else None
            line, column = (where.line, where.column) if where else doc.locate(("variants",))
            problems.append(
                Problem(
                    doc.file,
                    line,
                    column,
                    "duplicate-variant",
                    f"variant name '{variant.name}' is taken (by the base or another variant)",
                )
            )
        seen.add(variant.name)
    if not variants:
        problems.append(
            doc.problem((), "missing-key", "a sweep needs at least one variant or a grid")
        )
    return problems


def load_sweep(file: Path) -> Sweep:
    """Load a sweep file, its base study, and check every variant as a study.

    Raises:
        ConfigError: The sweep file, the base study or a variant is wrong; a variant's
            problems are located at the sweep file's line that wrote the value at fault.
    """
    file = file.resolve()
    doc = load_yaml(file)
    spec = validate_document(doc, SweepFile)
    base_file = spec.base if spec.base.is_absolute() else (file.parent / spec.base).resolve()
    if not base_file.is_file():
        raise ConfigError(
            [
                doc.problem(
                    ("base",),
                    "missing-file",
                    f"the base study {base_file} does not exist (relative to the sweep file)",
                    at_value=True,
                )
            ]
        )
    base = load_study(base_file)
    conditions = base.study.outcomes.conditions
    problems = [
        doc.problem(
            ("outcomes", i) if isinstance(doc.data.get("outcomes"), list) else ("outcomes",),
            "unknown-outcome",
            f"'{name}' is not an outcome of the base study{did_you_mean(name, conditions)}",
            at_value=True,
        )
        for i, name in enumerate(spec.outcomes)
        if name not in conditions
    ]
    variants = _variants(doc, spec)
    problems += _name_problems(doc, variants)
    if problems:
        raise ConfigError(problems)
    sweep = Sweep(
        file,
        spec.sweep,
        spec.title or base.study.title,
        base,
        spec.outcomes or conditions,
        tuple(variants),
    )
    for variant in variants:
        try:
            load_variant(sweep, variant)
        except ConfigError as err:
            problems += err.problems
    if problems:
        raise ConfigError(problems)
    return sweep


def target_parts(text: str) -> list[str | int]:
    """An override's dotted target as path parts (digits as list positions)."""
    return [int(part) if part.isdigit() else part for part in text.split(".")]


def _step(node: Any, segment: str | int) -> tuple[list[str | int], str | None]:
    """The path parts one segment stands for inside ``node``, or why it stands for none."""
    if isinstance(node, list):
        if isinstance(segment, int):
            if segment >= len(node):
                return [], f"there are {len(node)} items, so no item {segment}"
            return [segment], None
        names = [item.get("name") if isinstance(item, dict) else None for item in node]
        if segment in names:
            return [names.index(segment)], None
        keyed = [i for i, item in enumerate(node) if isinstance(item, dict) and segment in item]
        if len(keyed) == 1:
            return [keyed[0], segment], None
        if len(keyed) > 1:
            return [], f"{len(keyed)} items hold '{segment}'; choose one by its position"
        choices = [n for n in names if n] + [k for i in node if isinstance(i, dict) for k in i]
        return [], f"no item is named or holds '{segment}'{did_you_mean(str(segment), choices)}"
    if isinstance(segment, int):
        return [], f"item {segment} was asked of a value that is not a list"
    return [segment], None


def apply_override(
    doc: LocatedDocument, parts: list[str | int], value: Any, mark: int
) -> LocatedDocument:
    """``doc`` with the value at ``parts`` replaced; positions there become the mark ``mark``.

    Raises:
        ValueError: The path does not lead to a place a value can be written.
    """
    data = copy.deepcopy(doc.data)
    node: Any = data
    path: list[str | int] = []
    for index, segment in enumerate(parts):
        steps, why = _step(node, segment)
        if why:
            raise ValueError(f"at '{'.'.join(str(p) for p in parts[: index + 1])}': {why}")
        for i, part in enumerate(steps):
            path.append(part)
            last = index == len(parts) - 1 and i == len(steps) - 1
            if last:
                node[part] = copy.deepcopy(value)
            elif isinstance(node, dict) and not isinstance(node.get(part), dict | list):
                if part in node and node[part] is not None:
                    raise ValueError(f"'{'.'.join(str(p) for p in path)}' holds a single value")
                node[part] = {}
                node = node[part]
            else:
                node = node[part]
    where = (-mark, 0)
    top = tuple(path)

    def kept(key: PathKey) -> bool:
        return key[: len(top)] != top

    positions = {k: v for k, v in doc.positions.items() if kept(k)}
    values = {k: v for k, v in doc.value_positions.items() if kept(k)}
    for end in range(1, len(top) + 1):
        positions.setdefault(top[:end], where)
    positions[top] = values[top] = where
    return LocatedDocument(doc.file, data, positions, values)


def load_variant(sweep: Sweep, variant: Variant) -> LoadedStudy:
    """The base study with a variant's overrides, loaded and checked like a study file.

    Raises:
        ConfigError: An override names no key of the base or a value is refused; each
            problem is located at the override in the sweep file.
    """
    base = sweep.base
    documents: dict[Path, LocatedDocument] = {}
    targets: list[Path] = []  # the file each override replaces a value of
    problems: list[Problem] = []
    for mark, override in enumerate(variant.overrides, start=1):

        def problem(message: str, code: str = "unknown-key", ov: Override = override) -> None:
            problems.append(
                Problem(
                    sweep.file,
                    ov.line,
                    ov.column,
                    code,
                    f"variant '{variant.name}': {ov.target}: {message}",
                )
            )

        parts = target_parts(override.target)
        if parts[0] not in TARGETS or len(parts) < 2:
            problem(
                f"a target starts with study. or definition.{did_you_mean(str(parts[0]), TARGETS)}"
            )
            continue
        if parts[0] == "study":
            file, rest = base.file, parts[1:]
        else:
            name = str(parts[1])
            if name not in base.catalog.files or len(parts) < 3:
                problem(
                    f"'{name}' is not a definition the study can read"
                    f"{did_you_mean(name, base.catalog.files)}"
                )
                continue
            file, rest = base.catalog.files[name].resolve(), parts[2:]
        targets.append(file)
        current = documents.get(file) or load_yaml(file)
        try:
            documents[file] = apply_override(current, rest, override.value, mark)
        except ValueError as err:
            problem(str(err))
    if problems:
        raise ConfigError(problems)
    try:
        return load_study(base.file, documents)
    except ConfigError as err:
        relocated = [_relocated(sweep, variant, targets, p) for p in err.problems]
        raise ConfigError(relocated) from err


def _relocated(sweep: Sweep, variant: Variant, targets: list[Path], problem: Problem) -> Problem:
    """A variant's problem moved to the override in the sweep file that caused it.

    A problem at a replaced value carries a negative mark as its line. The base study loaded
    without problems, so any other problem (a check of a whole mapping, a cross-reference)
    also comes from the variant: it is given to the first override of the file it names (else
    the variant's first), with the place in the base file as well.
    """
    if problem.line < 0:
        override = variant.overrides[-problem.line - 1]
        message = problem.message
    else:
        chosen = [i for i, file in enumerate(targets) if file == problem.file.resolve()]
        override = variant.overrides[chosen[0] if chosen else 0]
        message = f"{problem.message} (at {problem.file.name}:{problem.line}:{problem.column})"
    return Problem(
        sweep.file,
        override.line,
        override.column,
        problem.code,
        f"variant '{variant.name}': {override.target}: {message}",
    )
