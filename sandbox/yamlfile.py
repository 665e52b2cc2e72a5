"""One YAML reader for robot, test and controller-config files, within bounds.

Plain YAML only: what these files need and nothing a hostile file could use to
hang or exhaust the process. Refused, each with the file, the line and the key:
anchors and aliases (``&name``/``*name``: no such file needs them, and a chain
of them is the "billion laughs" memory bomb), a key given twice in one mapping,
nesting deeper than ``MAX_DEPTH``, a text longer than ``MAX_TEXT``, a number
written with more than ``MAX_NUMBER_TEXT`` characters, a file larger than
``MAX_FILE_BYTES``. YAML 1.1's sexagesimal integers are not read as numbers:
``gear_ratio: 1:48`` stays the text "1:48" (a ratio), not 108.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import yaml

from .units import MAX_NUMBER_TEXT

MAX_FILE_BYTES = 256 * 1024  # robot and test files are a few kilobytes
MAX_DEPTH = 16  # a robot file nests 5 levels (body.parts[0].size[2])
MAX_TEXT = 2000  # characters in one text value (a test's description)

_INT = "tag:yaml.org,2002:int"
_FLOAT = "tag:yaml.org,2002:float"
_STR = "tag:yaml.org,2002:str"
# PyYAML's YAML 1.1 patterns without their base-60 branches ('1:48' -> 108).
_INT_PATTERN = re.compile(r"""^(?:[-+]?0b[0-1_]+
    |[-+]?0[0-7_]+
    |[-+]?(?:0|[1-9][0-9_]*)
    |[-+]?0x[0-9a-fA-F_]+)$""", re.X)
_FLOAT_PATTERN = re.compile(r"""^(?:[-+]?(?:[0-9][0-9_]*)\.[0-9_]*(?:[eE][-+][0-9]+)?
    |\.[0-9][0-9_]*(?:[eE][-+][0-9]+)?
    |[-+]?\.(?:inf|Inf|INF)
    |\.(?:nan|NaN|NAN))$""", re.X)


class YamlFileError(ValueError):
    """A YAML file that cannot be read within bounds; one line per problem."""

    def __init__(self, source: str, problems: list[str]):
        self.source = source
        self.problems = problems
        super().__init__("\n".join(f"{source}: {p}" for p in problems))


class _Refused(Exception):
    def __init__(self, mark: Any, path: str, problem: str):
        where = f"line {mark.line + 1}: " if mark is not None else ""
        super().__init__(f"{where}{path + ': ' if path else ''}{problem}")


class _BoundedLoader(yaml.SafeLoader):
    """SafeLoader that refuses anchors, aliases, duplicate keys and oversized values."""

    yaml_implicit_resolvers = {
        first: [(tag, pattern) for tag, pattern in resolvers if tag not in (_INT, _FLOAT)]
        for first, resolvers in yaml.SafeLoader.yaml_implicit_resolvers.items()
    }

    def __init__(self, stream: str):
        super().__init__(stream)
        self._path: list[str | int] = []

    def compose_node(self, parent, index):  # noqa: ANN001 (PyYAML's signature)
        event = self.peek_event()
        if isinstance(parent, yaml.SequenceNode) and isinstance(index, int):
            self._path.append(index)
        elif isinstance(parent, yaml.MappingNode) and isinstance(index, yaml.ScalarNode):
            self._path.append(str(index.value)[:40])
        else:  # a mapping's key, or the document itself
            self._path.append("")
        if isinstance(event, yaml.AliasEvent) or getattr(event, "anchor", None) is not None:
            raise _Refused(event.start_mark, _key_path(self._path),
                           "anchors and aliases (&name, *name) are not accepted: "
                           "write each value out")
        if len(self._path) > MAX_DEPTH + 1:
            raise _Refused(event.start_mark, _key_path(self._path[:-1]),
                           f"nested more than {MAX_DEPTH} levels deep (allowed: 1 to "
                           f"{MAX_DEPTH})")
        node = super().compose_node(parent, index)
        path = _key_path(self._path)
        self._path.pop()
        if isinstance(node, yaml.ScalarNode):
            _check_scalar(node, path)
        elif isinstance(node, yaml.MappingNode):
            _check_keys(node, path)
            _check_decimal_comma([v for pair in node.value for v in pair], path, True)
        elif isinstance(node, yaml.SequenceNode):
            _check_decimal_comma(node.value, path, False)
        return node


for _first in "-+0123456789":
    _BoundedLoader.add_implicit_resolver(_INT, _INT_PATTERN, [_first])
for _first in "-+0123456789.":
    _BoundedLoader.add_implicit_resolver(_FLOAT, _FLOAT_PATTERN, [_first])


def _key_path(path: list[str | int]) -> str:
    out = ""
    for part in path:
        if isinstance(part, int):
            out += f"[{part}]"
        elif part:
            out += ("." if out else "") + part
    return out


def _check_scalar(node: yaml.ScalarNode, path: str) -> None:
    size = len(node.value)
    if node.tag in (_INT, _FLOAT) and size > MAX_NUMBER_TEXT:
        raise _Refused(node.start_mark, path, f"a number of {size} digits: at most "
                       f"{MAX_NUMBER_TEXT} characters (a double holds 17 significant digits)")
    if size > MAX_TEXT:
        raise _Refused(node.start_mark, path, f"a text of {size} characters: at most "
                       f"{MAX_TEXT}")


def _check_keys(node: yaml.MappingNode, path: str) -> None:
    seen: dict[tuple[str, str], int] = {}
    for key, _value in node.value:
        if not isinstance(key, yaml.ScalarNode):
            continue  # a list or mapping as a key: the constructor refuses it
        ident = (key.tag, key.value)
        line = key.start_mark.line + 1
        if ident in seen:
            where = f"{path}.{key.value}" if path else str(key.value)
            lines = (f"twice on line {line}" if seen[ident] == line
                     else f"twice (lines {seen[ident]} and {line})")
            raise _Refused(key.start_mark, where, f"given {lines}: keep one")
        seen[ident] = line


_UNIT_AFTER_DIGITS = re.compile(r"^[0-9]+\s*[A-Za-z%°µ]")


def _check_decimal_comma(nodes: list, path: str, mapping: bool) -> None:
    """'{radius: 32,5 mm}' reads as radius 32 and a key '5 mm'; '[0, 32,5 mm]' as a fourth
    item: a number, a comma with no space, and digits with a unit is a decimal comma."""
    for i, (prev, nxt) in enumerate(zip(nodes, nodes[1:])):
        if not (isinstance(prev, yaml.ScalarNode) and isinstance(nxt, yaml.ScalarNode)):
            continue
        if prev.style is not None or nxt.style is not None or prev.tag != _INT:
            continue
        between = prev.end_mark.buffer[prev.end_mark.index:nxt.start_mark.index] \
            if prev.end_mark.buffer is not None else None
        if between == "," and _UNIT_AFTER_DIGITS.match(nxt.value):
            where = path
            if mapping and i % 2 == 1:  # prev is a value: name its key
                where = f"{path}.{nodes[i - 1].value}" if path else str(nodes[i - 1].value)
            text = f"{prev.value},{nxt.value}"
            fixed = f"{prev.value}.{nxt.value}"
            raise _Refused(prev.start_mark, where,
                           f"'{text}' has a decimal comma (YAML reads {prev.value!r} and "
                           f"{nxt.value!r}): write {fixed}")


def parse_yaml_text(text: str, source: str) -> Any:
    """YAML text to plain Python data within the bounds above; raises YamlFileError naming
    the line and the key (syntax errors: the line and column)."""
    size = len(text.encode("utf-8", "surrogatepass"))
    if size > MAX_FILE_BYTES:
        raise YamlFileError(source, [f"the file is {size} bytes: at most {MAX_FILE_BYTES} "
                                     "(these files are a few kilobytes)"])
    loader = None
    try:
        loader = _BoundedLoader(text)
        return loader.get_single_data()
    except _Refused as err:
        raise YamlFileError(source, [str(err)]) from None
    except yaml.YAMLError as err:
        mark = getattr(err, "problem_mark", None)
        where = f"line {mark.line + 1}, column {mark.column + 1}: " if mark else ""
        problem = getattr(err, "problem", None) or str(err).splitlines()[0]
        raise YamlFileError(source, [f"{where}YAML syntax error: {problem}"]) from None
    except (ValueError, RecursionError, OverflowError) as err:  # '2020-13-45', deep nesting
        raise YamlFileError(source, [f"cannot read the YAML: {err}"]) from None
    finally:
        if loader is not None:
            loader.dispose()


def read_yaml_file(path: Path, source: str | None = None) -> Any:
    """Read a YAML file (at most MAX_FILE_BYTES, UTF-8) and parse it within bounds."""
    source = source or str(path)
    try:
        size = path.stat().st_size
        if size > MAX_FILE_BYTES:
            raise YamlFileError(source, [f"the file is {size} bytes: at most "
                                         f"{MAX_FILE_BYTES} (these files are a few kilobytes)"])
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as err:
        raise YamlFileError(source, [f"cannot read the file: {err}"]) from None
    return parse_yaml_text(text, source)


def parse_scalar(text: str) -> Any:
    """One value as the files read it (for ``--set key=value``): '0.4' -> 0.4, '35 mm' and
    '1:48' stay text, '[0, 0, 1]' a list. Text that is not such a value comes back as is."""
    try:
        return parse_yaml_text(text, "<value>")
    except YamlFileError:
        return text
