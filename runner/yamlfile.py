"""YAML loading that remembers where every key and value came from.

PyYAML's safe loader resolves plain scalars by YAML 1.1 rules, where `no`,
`on` and `2026-01-01` silently become a boolean and a date. weir resolves
them by the YAML 1.2 core schema instead: only `true`/`false` are booleans,
`null`/`~`/empty is null, numbers are numbers, everything else is a string.
Numbers keep their source text, so a field declared as a string gets exactly
what was typed (`01` stays `01`).

`load_marked` returns the data and a map from key path to (line, column) of
the value and of the key, 1-based, for error messages.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import Any

import yaml

Path = tuple[str | int, ...]


class YamlInt(int):
    """An int that remembers the text it was written as."""

    yaml_text: str


class YamlFloat(float):
    """A float that remembers the text it was written as."""

    yaml_text: str


class _CoreLoader(yaml.SafeLoader):
    """SafeLoader with YAML 1.2 core-schema implicit resolvers."""


_CoreLoader.yaml_implicit_resolvers = {}
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
            key = _build(key_node, path + ("<key>",), out)
            if isinstance(key, list | dict):  # `? [a, b]`: legal YAML, unusable as a key
                raise yaml.constructor.ConstructorError(
                    None, None, "a key must be a plain value, not a list or mapping", key_node.start_mark
                )
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
