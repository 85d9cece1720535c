"""YAML loading that remembers where every key and value came from.

PyYAML's safe loader resolves plain scalars by YAML 1.1 rules, where `no`,
`on` and `2026-01-01` silently become a boolean and a date. weir resolves
them by the YAML 1.2 core schema instead: only `true`/`false` are booleans,
`null`/`~`/empty is null, numbers are numbers, everything else is a string.
Numbers keep their source text, so a field declared as a string gets exactly
what was typed (`01` stays `01`).

`load_marked` returns the data and a map from key path to (line, column) of
the value and of the key, 1-based, for error messages.

A job file is read on every tick of `weir serve`, so what one file can cost
is bounded before it gets expensive: nesting deeper than `MAX_DEPTH` stops
the scanner, and aliases (`*name`) may copy at most `MAX_ALIAS_VALUES` values
(a file at most `MAX_VALUES` once every alias is expanded), so an alias bomb
is refused after a few thousand steps instead of filling memory. Each limit
raises `YamlLimit`, a marked error pointing at the place it was passed.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import Any

import yaml
from yaml.events import AliasEvent, CollectionStartEvent

Path = tuple[str | int, ...]

MAX_DEPTH = 32
"""Most levels of nesting in a job file (a real one needs about 6)."""
MAX_VALUES = 20_000
"""Most values (scalars, lists, mappings) in a job file, aliases expanded."""
MAX_ALIAS_VALUES = 10_000
"""Most values that aliases (`*name`) may copy in one job file."""

_SURROGATE = re.compile("[\ud800-\udfff]")


class YamlLimit(yaml.MarkedYAMLError):
    """A job file passed one of the limits above (marked where it did)."""


class YamlInt(int):
    """An int that remembers the text it was written as."""

    yaml_text: str


class YamlFloat(float):
    """A float that remembers the text it was written as."""

    yaml_text: str


class _CoreLoader(yaml.SafeLoader):
    """SafeLoader with YAML 1.2 core-schema implicit resolvers and bounded cost."""

    def __init__(self, stream: str) -> None:
        super().__init__(stream)
        self._depth = 0
        self._sizes: dict[int, int] = {}  # id(node) -> values it stands for, aliases expanded
        self._total = 0
        self._copied = 0

    def _limit(self, message: str, mark: yaml.Mark) -> YamlLimit:
        return YamlLimit(None, None, message, mark)

    # The scanner keeps one entry per open flow level and rescans them all at
    # every token: cap the levels before that turns quadratic.
    def fetch_flow_collection_start(self, TokenClass: Any) -> None:
        if self.flow_level >= MAX_DEPTH:
            raise self._limit(f"nested deeper than {MAX_DEPTH} levels", self.get_mark())
        super().fetch_flow_collection_start(TokenClass)

    def add_indent(self, column: int) -> bool:
        if len(self.indents) > MAX_DEPTH and self.indent < column:  # indents[0] is the root's
            raise self._limit(f"nested deeper than {MAX_DEPTH} levels", self.get_mark())
        return super().add_indent(column)

    def compose_node(self, parent: Any, index: Any) -> Any:
        if self.check_event(AliasEvent):
            mark = self.peek_event().start_mark
            node = super().compose_node(parent, index)
            size = self._sizes.get(id(node))
            if size is None:
                raise self._limit("an alias inside the value it names (a structure without end)", mark)
            self._copied += size
            self._total += size
            if self._copied > MAX_ALIAS_VALUES:
                raise self._limit(
                    f"aliases copy more than {MAX_ALIAS_VALUES:,} values in this file", mark)
            if self._total > MAX_VALUES:
                raise self._limit(f"more than {MAX_VALUES:,} values once aliases are expanded", mark)
            return node
        nests = self.check_event(CollectionStartEvent)
        self._depth += nests
        if self._depth > MAX_DEPTH:
            raise self._limit(f"nested deeper than {MAX_DEPTH} levels", self.peek_event().start_mark)
        try:
            node = super().compose_node(parent, index)
        finally:
            self._depth -= nests
        self._total += 1
        if self._total > MAX_VALUES:
            raise self._limit(f"more than {MAX_VALUES:,} values", node.start_mark)
        if isinstance(node, yaml.SequenceNode):
            size = 1 + sum(self._sizes[id(item)] for item in node.value)
        elif isinstance(node, yaml.MappingNode):
            size = 1 + sum(self._sizes[id(k)] + self._sizes[id(v)] for k, v in node.value)
        else:
            size = 1
        self._sizes[id(node)] = size
        return node


_CoreLoader.yaml_implicit_resolvers = {}
# `<<: *defaults` merges a mapping (a YAML 1.1 type kept by common practice; the core schema lacks it)
_CoreLoader.add_implicit_resolver("tag:yaml.org,2002:merge", re.compile(r"^<<$"), ["<"])
_CoreLoader.add_implicit_resolver(
    "tag:yaml.org,2002:null", re.compile(r"^(?:~|null|Null|NULL|)$"), ["~", "n", "N", ""]
)
_CoreLoader.add_implicit_resolver(
    "tag:yaml.org,2002:bool", re.compile(r"^(?:true|True|TRUE|false|False|FALSE)$"), list("tTfF")
)
_CoreLoader.add_implicit_resolver(
    "tag:yaml.org,2002:int",
    re.compile(r"^(?:[-+]?[0-9]+|0o[0-7]+|0x[0-9a-fA-F]+)$"),
    list("-+0123456789"),
)
_CoreLoader.add_implicit_resolver(
    "tag:yaml.org,2002:float",
    re.compile(
        r"^(?:[-+]?(?:\.[0-9]+|[0-9]+(?:\.[0-9]*)?)(?:[eE][-+]?[0-9]+)?"
        r"|[-+]?\.(?:inf|Inf|INF)|\.(?:nan|NaN|NAN))$"
    ),
    list("-+.0123456789"),
)


@dataclass
class Marked:
    """Loaded YAML data plus the source position of every value and key."""

    data: Any
    values: dict[Path, tuple[int, int]] = field(default_factory=dict)
    keys: dict[Path, tuple[int, int]] = field(default_factory=dict)
    duplicates: list[tuple[Path, tuple[int, int]]] = field(default_factory=list)

    def where(self, path: Path, key: bool = False) -> tuple[int, int]:
        """Position of `path` (its key when `key`), else of its nearest known parent."""
        table = self.keys if key else self.values
        probe = tuple(path)
        while probe:
            if probe in table:
                return table[probe]
            if probe in self.values:
                return self.values[probe]
            probe = probe[:-1]
        return self.values.get((), (1, 1))


def _pos(node: yaml.Node) -> tuple[int, int]:
    return node.start_mark.line + 1, node.start_mark.column + 1


def _scalar(node: yaml.ScalarNode) -> Any:
    tag = node.tag
    text = node.value
    bad = _SURROGATE.search(text)
    if bad:
        raise yaml.constructor.ConstructorError(None, None, (
            f"\\u{ord(bad.group()):04X} is half of a UTF-16 surrogate pair, not a character "
            "(UTF-8 cannot store it); write the character itself"), node.start_mark)
    if tag == "tag:yaml.org,2002:null":
        return None
    if tag == "tag:yaml.org,2002:bool":
        return text.lower() == "true"
    if tag == "tag:yaml.org,2002:int":
        if text.startswith("0o"):
            value = YamlInt(int(text[2:], 8))
        elif text.startswith("0x"):
            value = YamlInt(int(text[2:], 16))
        else:
            value = YamlInt(int(text, 10))
        value.yaml_text = text
        return value
    if tag == "tag:yaml.org,2002:float":
        lowered = text.lower()
        if lowered.endswith("inf"):
            number = float("-inf") if lowered.startswith("-") else float("inf")
        elif lowered.endswith("nan"):
            number = float("nan")
        else:
            number = float(text)
        fvalue = YamlFloat(number)
        fvalue.yaml_text = text
        return fvalue
    return text


def _build(node: yaml.Node, path: Path, out: Marked) -> Any:
    out.values[path] = _pos(node)
    if isinstance(node, yaml.ScalarNode):
        try:
            return _scalar(node)
        except ValueError:  # an explicit tag the text does not fit, like `!!int abc`
            raise yaml.constructor.ConstructorError(
                None, None, f"cannot read {node.value!r} as {node.tag.rsplit(':', 1)[-1]}", node.start_mark
            ) from None
    if isinstance(node, yaml.SequenceNode):
        return [_build(item, path + (i,), out) for i, item in enumerate(node.value)]
    if isinstance(node, yaml.MappingNode):
        result: dict[Any, Any] = {}
        for key_node, value_node in node.value:
            if key_node.tag == "tag:yaml.org,2002:merge":
                merged = _build(value_node, path, out)
                for item in merged if isinstance(merged, list) else [merged]:
                    if isinstance(item, dict):
                        for k, v in item.items():
                            result.setdefault(k, v)
                continue
            if not isinstance(key_node, yaml.ScalarNode):  # `? [a, b]`: legal YAML, unusable as a key
                raise yaml.constructor.ConstructorError(
                    None, None, "a key must be a plain value, not a list or mapping", key_node.start_mark
                )
            key = _build(key_node, path + ("<key>",), out)
            key = key.yaml_text if isinstance(key, YamlInt | YamlFloat) else key
            key = str(key).lower() if isinstance(key, bool) else key
            key = "null" if key is None else key
            child = path + (key,)
            if key in result:
                out.duplicates.append((child, _pos(key_node)))
            out.keys[child] = _pos(key_node)
            result[key] = _build(value_node, child, out)
        out.values.pop(path + ("<key>",), None)
        return result
    raise yaml.YAMLError(f"unsupported YAML node {node!r}")  # pragma: no cover


def load_marked(text: str) -> Marked:
    """Parse one YAML document; raises yaml.YAMLError with marks on bad syntax."""
    loader = _CoreLoader(text)
    try:
        root = loader.get_single_node()
    finally:
        loader.dispose()
    out = Marked(data=None)
    if root is None:
        return out
    out.data = _build(root, (), out)
    return out


def source_text(value: Any) -> Any:
    """What the user typed for a scalar: numbers give their source text back."""
    if isinstance(value, YamlInt | YamlFloat):
        return value.yaml_text
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return str(value)
    return value


def dotted(path: tuple[str | int, ...]) -> str:
    return ".".join(str(p) for p in path)
