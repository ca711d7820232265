"""YAML loading that remembers where every value came from.

Pydantic reports errors by path (``rules[1].within_days``); users need ``file:line:col``. We
compose the YAML node tree ourselves and keep a map from each path to its position.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from pipeline.errors import ConfigError, Problem

PathKey = tuple[str | int, ...]


@dataclass(frozen=True)
class LocatedDocument:
    """A parsed YAML document with the position of every key and value.

    Attributes:
        file: Where it was read from.
        data: The plain Python value (dicts, lists, scalars).
        positions: Path -> (line, column), both 1-based; keys point at the key itself.
    """

    file: Path
    data: Any
    positions: dict[PathKey, tuple[int, int]] = field(repr=False)
    value_positions: dict[PathKey, tuple[int, int]] = field(repr=False, default_factory=dict)

    def locate(self, path: PathKey, *, at_value: bool = False) -> tuple[int, int]:
        """Return the position of the deepest known prefix of ``path`` (its key, or value)."""
        if at_value and tuple(path) in self.value_positions:
            return self.value_positions[tuple(path)]
        for end in range(len(path), -1, -1):
            found = self.positions.get(tuple(path[:end]))
            if found is not None:
                return found
        return (0, 0)

    def holds_scalar(self, path: PathKey) -> bool:
        """Whether the value at ``path`` is a scalar (not a mapping or a list)."""
        node = self.data
        for part in path:
            try:
                node = node[part]
            except (KeyError, IndexError, TypeError):
                return False
        return not isinstance(node, dict | list)

    def problem(self, path: PathKey, code: str, message: str, *, at_value: bool = False) -> Problem:
        """Build a :class:`Problem` located at ``path`` (its key, or its value)."""
        line, column = self.locate(path, at_value=at_value)
        return Problem(self.file, line, column, code, message)


def _position(node: yaml.Node) -> tuple[int, int]:
    return (node.start_mark.line + 1, node.start_mark.column + 1)


class _Builder:
    def __init__(self, file: Path) -> None:
        self.file = file
        self.constructor = yaml.SafeLoader("")
        self.positions: dict[PathKey, tuple[int, int]] = {}
        self.value_positions: dict[PathKey, tuple[int, int]] = {}
        self.problems: list[Problem] = []

    def build(self, node: yaml.Node, path: PathKey) -> Any:
        self.positions.setdefault(path, _position(node))
        self.value_positions[path] = _position(node)
        if isinstance(node, yaml.MappingNode):
            result: dict[str, Any] = {}
            for key_node, value_node in node.value:
                key = self.constructor.construct_object(key_node)
                if not isinstance(key, str):
                    key = str(key)
                line, column = _position(key_node)
                if key in result:
                    self.problems.append(
                        Problem(
                            self.file, line, column, "duplicate-key", f"key '{key}' appears twice"
                        )
                    )
                    continue
                self.positions[(*path, key)] = (line, column)
                result[key] = self.build(value_node, (*path, key))
            return result
        if isinstance(node, yaml.SequenceNode):
            return [self.build(item, (*path, i)) for i, item in enumerate(node.value)]
        return self.constructor.construct_object(node)


def load_yaml(file: Path) -> LocatedDocument:
    """Read one YAML file into a :class:`LocatedDocument`.

    ``file`` is read with ``read_text``: a local path, or a site mapping file on a Hadoop
    file system (:class:`pipeline.extract.HadoopPath`), named in problems by its URI.

    Raises:
        ConfigError: The file cannot be read, is not valid YAML, or repeats a key.
    """
    try:
        text = file.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as err:
        raise ConfigError(
            [Problem(file, 0, 0, "unreadable", f"cannot read the file: {err}")]
        ) from err
    try:
        node = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.MarkedYAMLError as err:
        mark = err.problem_mark or err.context_mark
        line, column = (mark.line + 1, mark.column + 1) if mark else (0, 0)
        message = f"not valid YAML: {err.problem or err.context}"
        raise ConfigError([Problem(file, line, column, "bad-yaml", message)]) from err
    if node is None:
        raise ConfigError([Problem(file, 0, 0, "empty-file", "the file is empty")])
    builder = _Builder(file)
    try:
        data = builder.build(node, ())
    except yaml.constructor.ConstructorError as err:
        mark = err.problem_mark
        line, column = (mark.line + 1, mark.column + 1) if mark else (0, 0)
        raise ConfigError([Problem(file, line, column, "bad-yaml", str(err.problem))]) from err
    if builder.problems:
        raise ConfigError(builder.problems)
    return LocatedDocument(file, data, builder.positions, builder.value_positions)
