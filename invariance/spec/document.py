"""Reading a pipeline document: YAML text or a dict -> plain dicts, lists and values.

YAML is read with a ``yaml.SafeLoader`` subclass only, so no tag can ever construct a
Python object; keys written twice, runaway aliases and deep nesting are refused with one
line. A dict pipeline is reduced to plain values the same way.
"""

from __future__ import annotations

import os
from typing import Mapping

import yaml

from ..errors import SpecificationError, shorten


#: Limits of a pipeline document: nodes after alias expansion, and nesting depth.
MAX_NODES = 100_000
MAX_DEPTH = 40


class _PipelineLoader(yaml.SafeLoader):
    """``yaml.SafeLoader`` that refuses a key written twice in one mapping."""

    def construct_mapping(self, node, deep=False):
        if isinstance(node, yaml.MappingNode):
            seen: dict = {}
            for key_node, _ in node.value:
                if key_node.tag == "tag:yaml.org,2002:merge":
                    continue
                key = self.construct_object(key_node, deep=True)
                line = key_node.start_mark.line + 1
                try:
                    if key in seen:
                        raise _DuplicateKey(key, seen[key], line)
                    seen[key] = line
                except TypeError:
                    continue  # unhashable key: the base class reports it
        return super().construct_mapping(node, deep=deep)


class _DuplicateKey(Exception):
    def __init__(self, key, first: int, again: int):
        super().__init__(key)
        self.key, self.first, self.again = key, first, again


def _children(node) -> list:
    if isinstance(node, yaml.SequenceNode):
        return list(node.value)
    if isinstance(node, yaml.MappingNode):
        return [n for pair in node.value for n in pair]
    return []


def _node_extent(root) -> tuple[int, int]:
    """(nodes after alias expansion, depth) of a composed YAML graph, without expanding it.

    Shared nodes (aliases) are counted once per use through a memo; a node that contains
    itself raises ``ValueError``.
    """
    size: dict[int, int] = {}
    depth: dict[int, int] = {}
    on_path: set[int] = set()
    stack = [(root, False)]
    while stack:
        node, done = stack.pop()
        key = id(node)
        if done:
            kids = _children(node)
            size[key] = min(1 + sum(size[id(k)] for k in kids), 10 * MAX_NODES)
            depth[key] = 1 + max((depth[id(k)] for k in kids), default=0)
            on_path.discard(key)
            continue
        if key in size:
            continue
        if key in on_path:
            raise ValueError("an alias refers to a value that contains it")
        on_path.add(key)
        stack.append((node, True))
        stack.extend((k, False) for k in _children(node) if id(k) not in size)
    return size[id(root)], depth[id(root)]


def parse_yaml(text: str, *, name: str = "pipeline") -> dict:
    """Parse pipeline YAML safely into a dict.

    No tag constructs an object; a key written twice in one mapping, aliases that expand
    beyond :data:`MAX_NODES` values or refer to themselves, and nesting deeper than
    :data:`MAX_DEPTH` are refused with one line.
    """
    loader = _PipelineLoader(text)
    try:
        node = loader.get_single_node()
        if node is not None:
            nodes, depth = _node_extent(node)
            if nodes > MAX_NODES:
                raise SpecificationError(
                    f"{name} expands to more than {MAX_NODES} values (through aliases); a pipeline is small: "
                    "write the values out instead of nesting aliases."
                )
            if depth > MAX_DEPTH:
                raise SpecificationError(
                    f"{name} is nested {depth} levels deep; a pipeline needs at most a few: fix the brackets or indentation."
                )
        doc = None if node is None else loader.construct_document(node)
    except ValueError as exc:
        if isinstance(exc, SpecificationError):
            raise
        raise SpecificationError(f"{name}: {exc}; write the value out instead.") from None
    except RecursionError:
        raise SpecificationError(
            f"{name} is nested too deeply to read; a pipeline needs at most a few levels: fix the brackets or indentation."
        ) from None
    except _DuplicateKey as exc:
        raise SpecificationError(
            f"{name}: key {shorten(exc.key)} is written twice in one section (lines {exc.first} and {exc.again}); "
            "keep one."
        ) from None
    except yaml.constructor.ConstructorError as exc:
        tag = getattr(exc, "problem", "") or ""
        mark = getattr(exc, "problem_mark", None)
        where = f" (line {mark.line + 1})" if mark is not None else ""
        raise SpecificationError(
            f"{name}{where}: refused YAML tag ({tag.strip()[:120]}); tags that construct objects are never "
            "executed: remove the tag and write plain values."
        ) from None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" at line {mark.line + 1}, column {mark.column + 1}" if mark is not None else ""
        problem = getattr(exc, "problem", None) or str(exc).splitlines()[0]
        raise SpecificationError(f"{name} is not valid YAML{where}: {problem}; fix the syntax.") from None
    finally:
        loader.dispose()
    if not isinstance(doc, dict):
        kind = "empty" if doc is None else f"a {type(doc).__name__}"
        raise SpecificationError(f"{name} is {kind}, not a mapping of sections; start from `invariance new`.")
    return doc


def plain_document(obj, path: tuple = ()):
    """A dict pipeline as plain dicts, lists, text, numbers, booleans and ``None``.

    NumPy scalars become Python numbers and paths become text; any other object is
    refused with the key that holds it.
    """
    if isinstance(obj, Mapping):
        return {(k if isinstance(k, str) else _plain_key(k, path)): plain_document(v, path + (k,)) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [plain_document(v, path + (i,)) for i, v in enumerate(obj)]
    if obj is None or type(obj) in (str, bool, int, float):
        return obj
    item = getattr(obj, "item", None)
    if callable(item) and getattr(obj, "shape", None) == ():  # a NumPy scalar
        return plain_document(item(), path)
    for base in (bool, int, float, str):  # subclasses (enums and the like)
        if isinstance(obj, base):
            return base(obj)
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    where = ".".join(str(p) for p in path) or "(top level)"
    raise SpecificationError(
        f"Pipeline value at {where} is a {type(obj).__name__} ({shorten(obj)}); use plain numbers, text, "
        "booleans, lists and mappings."
    )


def _plain_key(key, path: tuple):
    if isinstance(key, (bool, int, float)) or (getattr(key, "shape", None) == () and callable(getattr(key, "item", None))):
        return plain_document(key, path)
    raise SpecificationError(
        f"Pipeline key {shorten(key)} under {'.'.join(map(str, path)) or '(top level)'} is a {type(key).__name__}; "
        "keys are text."
    )
