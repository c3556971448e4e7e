"""Read YAML with the safe loader and keep line numbers.

Values come back as plain Python objects, except that mappings are
:class:`Map` and sequences are :class:`Seq`, which remember the 1-based line
of themselves and of each item, so that validators can say
``file:line: message``.  Nothing in a file is ever evaluated as code: only
plain scalars (str, int, float, bool, null), lists and mappings are produced.
Any other tag (``!!python/...``, ``!!binary``, ``!!timestamp``, ``!!set``, a
local ``!tag``), on a scalar or on a collection, is refused; dates and ``=``
are read as text.  A scalar the YAML library cannot convert (``!!float abc``,
an integer of thousands of digits) is ``file:line: bad value``.

Aliases and merge keys (``<<``) are allowed, but before anything is expanded
the document is measured (memoised per node): more than ``MAX_NODES`` values,
a recursive alias, or nesting deeper than ``MAX_DEPTH`` is refused at once,
which stops alias bombs ("billion laughs").  Files are read whole, at most
``MAX_BYTES`` (callers give their own limit: robot and scenario files), and
only regular files (:mod:`sim.files.reading`).  The parser is libyaml's when
PyYAML has it (several times faster), else PyYAML's own; both give the same
values and lines.
"""
from __future__ import annotations

import os

import yaml

from sim.errors import InputError, clip, quote
from sim.files.reading import read_limited

MAX_BYTES = 1 << 20
MAX_NODES = 200_000
PRECOUNT = 64 * 1024   # characters: longer texts have their values counted before the nodes are built

_YAML = "tag:yaml.org,2002:"
SCALAR_TAGS = frozenset(_YAML + t for t in ("str", "int", "float", "bool", "null", "merge"))
_NO_IMPLICIT = (_YAML + "timestamp", _YAML + "value")   # read as text, not as dates or a "default value" marker
_C = getattr(yaml, "__with_libyaml__", False)


class _Loader(yaml.CSafeLoader if _C else yaml.SafeLoader):
    """The safe loader without implicit dates or ``=`` values."""

    yaml_implicit_resolvers = {
        first: [(tag, rx) for tag, rx in resolvers if tag not in _NO_IMPLICIT]
        for first, resolvers in yaml.SafeLoader.yaml_implicit_resolvers.items()}


def _tag_name(tag: str) -> str:
    return "!!" + tag[len(_YAML):] if tag.startswith(_YAML) else tag


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


def _check_tag(node, source) -> None:
    """Only plain values: refuse any other tag (on a scalar, a list or a mapping)."""
    ok = (node.tag in SCALAR_TAGS if isinstance(node, yaml.ScalarNode)
          else node.tag == _YAML + "seq" if isinstance(node, yaml.SequenceNode)
          else node.tag == _YAML + "map" if isinstance(node, yaml.MappingNode) else False)
    if not ok:
        raise InputError(source, node.start_mark.line + 1,
                         f"tag {quote(_tag_name(node.tag))} is not allowed here: files hold plain numbers, "
                         "text, true/false, lists and mappings")


def _convert(node, loader, source, budget):
    budget[0] -= 1
    if budget[0] < 0:
        raise InputError(source, node.start_mark.line + 1,
                         f"document expands to more than {MAX_NODES} values "
                         "(too many aliases?); refusing to read it")
    line = node.start_mark.line + 1
    _check_tag(node, source)
    if isinstance(node, yaml.ScalarNode):
        try:
            return loader.construct_object(node, deep=True)
        except yaml.YAMLError as exc:
            raise InputError(source, line, f"bad value {quote(node.value)}: "
                                           f"{clip(exc.problem or exc, 80)}") from None
        except (ValueError, TypeError, KeyError, ArithmeticError) as exc:
            what = {_YAML + "int": "a whole number", _YAML + "float": "a number",
                    _YAML + "bool": "true or false"}.get(node.tag, "a value")
            why = "it has too many digits" if "digits" in str(exc) else "it cannot be converted"
            raise InputError(source, line, f"bad value {quote(node.value)}: read as {what}, but {why}") from None
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
                _check_tag(vnode, source)
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
                raise InputError(source, kline, f"key {quote(key)} appears twice in the same mapping")
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
        Malformed YAML, more than one document, a tag other than plain
        values, a value that cannot be converted, deep nesting or an alias bomb.
    """
    nlines = max(1, text.count("\n") + (not text.endswith("\n")))
    try:
        loader = _Loader(text)
    except yaml.reader.ReaderError as exc:  # checked up front for the first characters
        raise _reader_error(exc, text, source, False) from None
    try:
        if len(text) > PRECOUNT:
            _count_values(text, source)
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
            line = max(1, min(line, nlines))
        what = exc.problem or exc.context or "malformed YAML"
        if "nesting depth" in what:
            raise InputError(source, line, f"values nested more than {MAX_DEPTH} levels deep; "
                                           "refusing to read it") from None
        raise InputError(source, line, f"malformed YAML: {clip(what, 100)}") from None
    except yaml.reader.ReaderError as exc:
        raise _reader_error(exc, text, source, _C) from None
    except yaml.YAMLError as exc:
        raise InputError(source, None, f"malformed YAML: {clip(exc, 100)}") from None
    finally:
        loader.dispose()


def _count_values(text: str, source: str) -> None:
    """Refuse a document of more than ``MAX_NODES`` written values from its parser events,
    before building anything (several times cheaper than building the nodes)."""
    loader = _Loader(text)
    try:
        n = 0
        while loader.check_event():
            ev = loader.get_event()
            if isinstance(ev, (yaml.ScalarEvent, yaml.SequenceStartEvent, yaml.MappingStartEvent)):
                n += 1
                if n > MAX_NODES:
                    raise InputError(source, ev.start_mark.line + 1,
                                     f"more than {MAX_NODES} values in the file; refusing to read it")
    finally:
        loader.dispose()


def _reader_error(exc, text: str, source: str, byte_offset: bool) -> InputError:
    """A character YAML does not allow (NUL, other control characters)."""
    pos = exc.position if isinstance(exc.position, int) else 0
    if byte_offset:  # libyaml counts bytes of the UTF-8 text
        line = text.encode("utf-8", "surrogatepass")[:pos].count(b"\n") + 1
    else:
        line = text.count("\n", 0, pos) + 1
    char = exc.character if isinstance(exc.character, int) else 0
    return InputError(source, line, f"character #x{char:04x} is not allowed in YAML text")


def load_bytes(raw: bytes, source: str):
    """Parse the bytes of a YAML file (UTF-8) with line information."""
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise InputError(source, line, "file is not UTF-8 text") from None
    return load_text(text, source)


def load_file(path: str | os.PathLike, limit: int = MAX_BYTES, what: str = "YAML file"):
    """Read a YAML file (a regular file of at most ``limit`` bytes) with line information."""
    source = os.fspath(path)
    return load_bytes(read_limited(source, limit, what), source)
