"""YAML for specs: safe-load semantics, duplicate keys, scientific notation, key lines.

On top of PyYAML's safe loader: a duplicate key anywhere is an error (plain
``safe_load`` silently keeps the last one); a plain scalar such as ``1e-4`` is
a number (PyYAML's YAML 1.1 resolver wants ``1.0e-4``); every key's line is
remembered so that errors can name it; tags that would construct objects are
refused; alias expansion is bounded.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

import yaml

MAX_NODES = 100_000  # guards against alias bombs ("billion laughs")

_SCI = re.compile(r"^[-+]?(?:\d[\d_]*(?:\.\d*)?|\.\d+)[eE][-+]?\d+$")
_SAFE_TAGS = {
    "tag:yaml.org,2002:" + t
    for t in ("str", "int", "float", "bool", "null", "map", "seq", "timestamp", "binary")
}


class _Loader(yaml.SafeLoader):
    pass


@dataclass
class Doc:
    """Lines of keys and the errors found, for one spec file (``filename`` None for a mapping)."""

    lines: dict[tuple[str, ...], int]
    errors: list[str]
    filename: str | None
    nodes: int = 0

    def where(self, path: tuple[str, ...]) -> str:
        if self.filename is None:
            return ""
        probe = path
        while probe and probe not in self.lines:
            probe = probe[:-1]
        line = self.lines.get(probe)
        return f" ({self.filename}, line {line})" if line else f" ({self.filename})"

    def error(self, path: tuple[str, ...], message: str) -> None:
        key = ".".join(path) if path else "spec"
        self.errors.append(f"{key}: {message}{self.where(path)}")


def read_yaml(text: str, doc: Doc) -> Any:
    """Plain data from ``text``; problems go to ``doc.errors``, key lines to ``doc.lines``."""
    loader = _Loader(text)
    try:
        node = loader.get_single_node()
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark
        where = f" ({doc.filename}, line {mark.line + 1})" if mark and doc.filename else ""
        doc.errors.append(f"spec: YAML syntax error: {exc.problem}{where}")
        return None
    except yaml.YAMLError as exc:
        doc.errors.append(f"spec: YAML error: {exc}")
        return None
    finally:
        loader.dispose()
    if node is None:
        return None
    return _convert(node, loader, (), doc)


def _convert(node: yaml.Node, loader: _Loader, path: tuple[str, ...], doc: Doc) -> Any:
    doc.nodes += 1
    if doc.nodes > MAX_NODES:
        if doc.nodes == MAX_NODES + 1:
            doc.error(path, f"more than {MAX_NODES} YAML nodes (alias expansion?)")
        return None
    if isinstance(node, yaml.MappingNode):
        if node.tag != "tag:yaml.org,2002:map":
            doc.error(path, f"YAML tag {node.tag!r} is not allowed (plain data only)")
            return None
        out: dict[str, Any] = {}
        for key_node, value_node in node.value:
            if not isinstance(key_node, yaml.ScalarNode):
                doc.error(path, "keys must be plain scalars")
                continue
            key = _scalar(key_node, loader, path, doc)
            key = str(key) if key is not None else "null"
            sub = (*path, key)
            if key in out:
                first = doc.lines.get(sub)
                where = f" (first at line {first})" if first else ""
                doc.errors.append(
                    f"{'.'.join(sub)}: duplicate key{where}"
                    + (f" ({doc.filename}, line {key_node.start_mark.line + 1})" if doc.filename else "")
                )
                continue
            doc.lines[sub] = key_node.start_mark.line + 1
            out[key] = _convert(value_node, loader, sub, doc)
        return out
    if isinstance(node, yaml.SequenceNode):
        if node.tag != "tag:yaml.org,2002:seq":
            doc.error(path, f"YAML tag {node.tag!r} is not allowed (plain data only)")
            return None
        items = []
        for i, item in enumerate(node.value):
            sub = (*path, str(i))
            doc.lines.setdefault(sub, item.start_mark.line + 1)
            items.append(_convert(item, loader, sub, doc))
        return items
    return _scalar(node, loader, path, doc)


def _scalar(node: yaml.Node, loader: _Loader, path: tuple[str, ...], doc: Doc) -> Any:
    if node.tag not in _SAFE_TAGS:
        doc.error(path, f"YAML tag {node.tag!r} is not allowed (plain data only)")
        return None
    if node.tag == "tag:yaml.org,2002:str" and node.style is None and _SCI.match(node.value):
        # PyYAML's YAML 1.1 resolver wants "1.0e-4"; people write "1e-4" and mean a number.
        return float(node.value.replace("_", ""))
    try:
        return loader.construct_object(node, deep=True)
    except yaml.YAMLError as exc:
        doc.error(path, f"cannot read value: {exc}")
        return None
