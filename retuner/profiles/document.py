"""Reading a YAML file into mappings and lists that remember the line of every value.

Everything a file can make us compute is bounded here: its size, its nesting depth, and its
text encoding is checked with the position of the first bad byte. Every breach is one
:class:`RetunerError` line naming the file and the place.
"""

from __future__ import annotations

from typing import Any, Optional

import yaml

from retuner.errors import RetunerError

#: a profile or config is a few kilobytes; a per-key fit about 3 KB
MAX_BYTES = 1_000_000
#: a profile nests three levels deep; a config four
MAX_DEPTH = 32


class Mapping(dict):
    """A dict that remembers the line of each value (``lines``) and its own (``line``)."""

    def __init__(self, data: dict, lines: dict, line: int):
        super().__init__(data)
        self.lines = lines
        self.line = line


class Sequence(list):
    """A list that remembers the line of each item (``lines``) and its own (``line``)."""

    def __init__(self, data: list, lines: list, line: int):
        super().__init__(data)
        self.lines = lines
        self.line = line


def kind_of(v: Any) -> str:
    """A YAML value's kind in a user's words (for "expected ..., got ..." messages)."""
    if v is None:
        return "nothing (null)"
    for t, words in ((bool, "true/false"), (int, "a whole number"), (float, "a number"), (str, "text"),
                     (dict, "a mapping"), (list, "a list")):
        if isinstance(v, t):
            return words
    return type(v).__name__


class _Loader(yaml.SafeLoader):
    """SafeLoader that keeps lines and refuses nesting deeper than MAX_DEPTH (the composer
    recurses once per level, so a deep file would otherwise end in RecursionError)."""

    def __init__(self, stream):
        super().__init__(stream)
        self._depth = 0

    def compose_node(self, parent, index):
        self._depth += 1
        try:
            if self._depth > MAX_DEPTH:
                mark = self.peek_event().start_mark
                raise RetunerError(f"nested more than {MAX_DEPTH} levels deep", line=mark.line + 1)
            return super().compose_node(parent, index)
        finally:
            self._depth -= 1


def _construct_mapping(loader: _Loader, node: yaml.MappingNode, deep: bool = False):
    mapping = {}
    lines = {}
    for key_node, value_node in node.value:
        key = loader.construct_object(key_node, deep=deep)
        try:
            hash(key)
        except TypeError:
            raise RetunerError("a field name must be plain text", line=key_node.start_mark.line + 1) from None
        if key in mapping:
            raise RetunerError("duplicate field", line=key_node.start_mark.line + 1, field=str(key))
        mapping[key] = loader.construct_object(value_node, deep=deep)
        lines[key] = value_node.start_mark.line + 1
    return Mapping(mapping, lines, node.start_mark.line + 1)


def _construct_sequence(loader: _Loader, node: yaml.SequenceNode, deep: bool = False):
    items = [loader.construct_object(child, deep=deep) for child in node.value]
    return Sequence(items, [child.start_mark.line + 1 for child in node.value], node.start_mark.line + 1)


_Loader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)
_Loader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_SEQUENCE_TAG, _construct_sequence)


def load_yaml(text: str, filename: str) -> Any:
    """Parse YAML keeping line numbers; any problem becomes one RetunerError line."""
    if len(text) > MAX_BYTES:
        raise RetunerError(f"too large ({len(text)} characters; at most {MAX_BYTES})", file=filename)
    try:
        return yaml.load(text, Loader=_Loader)  # noqa: S506 - SafeLoader subclass
    except RetunerError as exc:
        exc.file = filename
        raise
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark else None
        raise RetunerError(f"not valid YAML: {exc.problem or exc.context}", file=filename, line=line) from None
    except yaml.YAMLError as exc:
        raise RetunerError(f"not valid YAML: {exc}", file=filename) from None
    except RecursionError:   # MAX_DEPTH keeps us far from it; never a traceback all the same
        raise RetunerError(f"nested too deeply (at most {MAX_DEPTH} levels)", file=filename) from None


def decode(data: bytes, filename: str) -> str:
    """UTF-8 text of a file's bytes; a bad byte is one line with its line and byte offset."""
    if len(data) > MAX_BYTES:
        raise RetunerError(f"too large ({len(data)} bytes; at most {MAX_BYTES})", file=filename)
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        raise RetunerError(f"not UTF-8 text: byte 0x{data[exc.start]:02X} at byte offset {exc.start}",
                           file=filename, line=line) from None


def read_text(path, filename: Optional[str] = None) -> str:
    """A file's text, checked (size, encoding); unreadable files are one line too."""
    name = filename or str(path)
    try:
        with open(path, "rb") as fh:
            data = fh.read(MAX_BYTES + 1)
    except OSError as exc:
        raise RetunerError(f"cannot read: {exc.strerror}", file=name) from None
    return decode(data, name)


class Where:
    """Where we are in a file, for error messages: ``where.err(msg, field, container, key)`` names
    the file, the line of ``container[key]`` (or of the container) and the field."""

    def __init__(self, filename: str):
        self.filename = filename

    def err(self, msg: str, field: str, container: Any = None, key: Any = None) -> RetunerError:
        line = None
        if isinstance(container, Mapping):
            line = container.lines.get(key, container.line) if key is not None else container.line
        elif isinstance(container, Sequence):
            line = container.lines[key] if isinstance(key, int) and 0 <= key < len(container) else container.line
        return RetunerError(msg, file=self.filename, line=line, field=field)
