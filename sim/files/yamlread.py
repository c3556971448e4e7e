"""Read YAML with the safe loader and keep line numbers.

Values come back as plain Python objects, except that mappings are
:class:`Map` and sequences are :class:`Seq`, which remember the 1-based line
of themselves and of each item, so that validators can say
``file:line: message``.  Nothing in a file is ever evaluated as code: only the
safe loader's scalar types (str, int, float, bool, null) are produced.

Aliases and merge keys (``<<``) are allowed, but before anything is expanded
the document is measured (memoised per node): more than ``MAX_NODES`` values,
a recursive alias, or nesting deeper than ``MAX_DEPTH`` is refused at once,
which stops alias bombs ("billion laughs").
"""
from __future__ import annotations

import os

import yaml

from sim.errors import InputError

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


MAX_DEPTH = 64
_MERGE = "tag:yaml.org,2002:merge"


def _children(node):
    if isinstance(node, yaml.SequenceNode):
        return list(node.value)
    if isinstance(node, yaml.MappingNode):
        return [n for pair in node.value for n in pair]
    return []


def _check_size(root, source):
    """Refuse alias bombs, recursive aliases and deep nesting before expanding anything.

    Counts the values the document expands to, memoised per node so that a
    bomb costs only its (small) number of distinct nodes.  The error names the
    innermost value that alone expands past ``MAX_NODES``.
    """
    size = {}
    too_big = MAX_NODES + 1

    def count(node, depth):
        key = id(node)
        if key in size:
            return size[key]
        if depth > MAX_DEPTH:
            raise InputError(source, node.start_mark.line + 1,
                             f"values nested more than {MAX_DEPTH} levels deep; refusing to read it")
        size[key] = too_big  # a node met again while being counted is a recursive alias
        n = 1
        for child in _children(node):
            n = min(n + count(child, depth + 1), too_big)
        size[key] = n
        return n

    if count(root, 0) <= MAX_NODES:
        return
    node = root
    while True:
        big = [c for c in _children(node) if size.get(id(c), 0) > MAX_NODES and c is not node]
        if not big or big[0] is root:
            break
        node = big[0]
    raise InputError(source, node.start_mark.line + 1,
                     f"this value expands to more than {MAX_NODES} values "
                     "(too many or recursive aliases?); refusing to read it")


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
        # Merge keys (``<<: *anchor`` or ``<<: [*a, *b]``): merged keys fill in
        # what the mapping does not say itself; earlier merged mappings win.
        merged, mlines = {}, {}
        explicit = Map()
        explicit.line = line
        explicit.lines = {}
        for knode, vnode in node.value:
            kline = knode.start_mark.line + 1
            if knode.tag == _MERGE:
                if "<<" in explicit.lines:
                    raise InputError(source, kline, "key '<<' appears twice in the same mapping")
                explicit.lines["<<"] = kline
                subs = vnode.value if isinstance(vnode, yaml.SequenceNode) else [vnode]
                for sub in subs:
                    if not isinstance(sub, yaml.MappingNode):
                        raise InputError(source, sub.start_mark.line + 1,
                                         "'<<' merges a mapping or a list of mappings")
                    m = _convert(sub, loader, source, budget)
                    for k, v in m.items():
                        if k not in merged:
                            merged[k] = v
                            mlines[k] = m.lines.get(k, kline)
                continue
            key = _convert(knode, loader, source, budget)
            if not isinstance(key, (str, int, float, bool)) or key is None:
                raise InputError(source, kline, "mapping keys must be plain names")
            if key in explicit:
                raise InputError(source, kline, f"key '{key}' appears twice in the same mapping")
            explicit[key] = _convert(vnode, loader, source, budget)
            explicit.lines[key] = kline
        explicit.lines.pop("<<", None)
        if not merged:
            return explicit
        out = Map()
        out.line = line
        out.lines = {}
        for k, v in merged.items():
            if k not in explicit:
                out[k] = v
                out.lines[k] = mlines[k]
        for k, v in explicit.items():
            out[k] = v
            out.lines[k] = explicit.lines[k]
        return out
    raise InputError(source, line, "unsupported YAML node")  # pragma: no cover


def load_text(text: str, source: str = "<inline>"):
    """Parse YAML text; return plain values with line information.

    Raises
    ------
    InputError
        Malformed YAML, more than one document, or an alias bomb.
    """
    try:
        loader = yaml.SafeLoader(text)
    except yaml.reader.ReaderError as exc:  # checked up front for the first characters
        raise _reader_error(exc, text, source) from None
    try:
        try:
            node = loader.get_single_node()
        except RecursionError:
            mark = loader.get_mark()
            raise InputError(source, mark.line + 1,
                             "values nested too deeply; refusing to read it") from None
        if node is None:
            return None
        _check_size(node, source)
        return _convert(node, loader, source, [MAX_NODES])
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark is not None else None
        if line is not None:  # "end of file" errors sit on the line after the last one
            line = max(1, min(line, len(text.splitlines()) or 1))
        what = exc.problem or exc.context or "malformed YAML"
        raise InputError(source, line, f"malformed YAML: {what}") from None
    except yaml.reader.ReaderError as exc:
        raise _reader_error(exc, text, source) from None
    except yaml.YAMLError as exc:
        raise InputError(source, None, f"malformed YAML: {exc}") from None
    finally:
        loader.dispose()


def _reader_error(exc, text: str, source: str) -> InputError:
    """A character YAML does not allow (NUL, other control characters)."""
    pos = exc.position if isinstance(exc.position, int) else 0
    line = text.count("\n", 0, pos) + 1
    return InputError(source, line, f"character #x{exc.character:04x} is not allowed in YAML text")


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
