"""Read YAML with the safe loader and keep line numbers.

Values come back as plain Python objects, except that mappings are
:class:`Map` and sequences are :class:`Seq`, which remember the 1-based line
of themselves and of each item, so that validators can say
``file:line: message``.  Nothing in a file is ever evaluated as code: only the
safe loader's scalar types (str, int, float, bool, null) are produced.

Aliases are allowed, but the expanded document is capped at
``MAX_NODES`` values, which stops alias bombs ("billion laughs") at once.
"""
from __future__ import annotations

import os

import yaml

from .errors import InputError

MAX_BYTES = 8 * 1024 * 1024
MAX_NODES = 200_000


class Map(dict):
    """A YAML mapping: ``line`` of the mapping, ``lines[key]`` of each key."""

    line: int | None = None
    lines: dict


class Seq(list):
    """A YAML sequence: ``line`` of the sequence, ``lines[i]`` of each item."""

    line: int | None = None
    lines: list


def line_of(container, key=None, default=None):
    """Line of ``container[key]`` (or of the container itself), if known."""
    if key is not None:
        lines = getattr(container, "lines", None)
        try:
            return lines[key]
        except (KeyError, IndexError, TypeError):
            pass
    return getattr(container, "line", None) or default


def _convert(node, loader, source, budget):
    budget[0] -= 1
    if budget[0] < 0:
        raise InputError(source, node.start_mark.line + 1,
                         f"document expands to more than {MAX_NODES} values "
                         "(too many aliases?); refusing to read it")
    line = node.start_mark.line + 1
    if isinstance(node, yaml.ScalarNode):
        try:
            return loader.construct_object(node, deep=True)
        except yaml.YAMLError as exc:
            raise InputError(source, line, f"bad value: {exc.problem or exc}") from None
    if isinstance(node, yaml.SequenceNode):
        out = Seq()
        out.line = line
        out.lines = []
        for item in node.value:
            out.append(_convert(item, loader, source, budget))
            out.lines.append(item.start_mark.line + 1)
        return out
    if isinstance(node, yaml.MappingNode):
        loader.flatten_mapping(node)
        out = Map()
        out.line = line
        out.lines = {}
        for knode, vnode in node.value:
            key = _convert(knode, loader, source, budget)
            kline = knode.start_mark.line + 1
            if not isinstance(key, (str, int, float, bool)) or key is None:
                raise InputError(source, kline, "mapping keys must be plain names")
            if key in out:
                raise InputError(source, kline, f"key '{key}' appears twice in the same mapping")
            out[key] = _convert(vnode, loader, source, budget)
            out.lines[key] = kline
        return out
    raise InputError(source, line, "unsupported YAML node")  # pragma: no cover


def load_text(text: str, source: str = "<inline>"):
    """Parse YAML text; return plain values with line information.

    Raises
    ------
    InputError
        Malformed YAML, more than one document, or an alias bomb.
    """
    loader = yaml.SafeLoader(text)
    try:
        node = loader.get_single_node()
        if node is None:
            return None
        return _convert(node, loader, source, [MAX_NODES])
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark is not None else None
        what = exc.problem or exc.context or "malformed YAML"
        raise InputError(source, line, f"malformed YAML: {what}") from None
    except yaml.YAMLError as exc:
        raise InputError(source, None, f"malformed YAML: {exc}") from None
    finally:
        loader.dispose()


def load_file(path: str | os.PathLike):
    """Read a YAML file (at most ``MAX_BYTES``) with line information."""
    source = os.fspath(path)
    try:
        with open(source, "rb") as fh:
            raw = fh.read(MAX_BYTES + 1)
    except FileNotFoundError:
        raise InputError(source, None, "file not found") from None
    except IsADirectoryError:
        raise InputError(source, None, "is a folder, expected a YAML file") from None
    except OSError as exc:
        raise InputError(source, None, f"cannot read file: {exc.strerror}") from None
    if len(raw) > MAX_BYTES:
        raise InputError(source, None, f"file is larger than {MAX_BYTES // (1024 * 1024)} MiB")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise InputError(source, line, "file is not UTF-8 text") from None
    return load_text(text, source)
