"""Safe, validating YAML reading shared by target profiles, policies and project config.

Why not plain ``yaml.safe_load``: users need every problem of a file at once,
each with its line and key path (``rules[2].max_param_bytes``) and a
"did you mean" for typos; and an alias bomb (billion laughs) must be refused
instead of expanded. We compose the document with PyYAML's safe composer
(nodes keep their marks, no Python objects are constructed) and walk it with
a node budget.

Typical use::

    doc = read_yaml_file(path)          # raises ConfigError on syntax errors
    root = doc.root_mapping()
    name = root.get_str("name", required=True)
    clock = root.get_quantity("clock", unit="Hz")
    root.finish()                       # reports unknown keys
    doc.raise_if_problems()             # one ConfigError with all problems
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path
from typing import Any

import yaml
from yaml.nodes import MappingNode, Node, ScalarNode, SequenceNode

from gate.errors import ConfigError, near_name
from gate.model.graph import INT64_MAX

MAX_FILE_BYTES = 4 * 1024 * 1024
MAX_NODES_VISITED = 200_000  # an alias bomb expands far beyond this; real files stay far below

_MISSING = object()
# Scalar tags the getters accept: the YAML core types (anything else, e.g. !!python/..., is refused).
_PLAIN_TAGS = frozenset(f"tag:yaml.org,2002:{name}" for name in
                        ("str", "int", "float", "bool", "null", "timestamp"))


@dataclass
class YamlDocument:
    """A composed YAML document plus the list of problems found while reading it."""

    path: str
    root: Node | None
    problems: list[str] = field(default_factory=list)
    _visited: int = 0

    def problem(self, node: Node | None, key_path: str, message: str) -> None:
        line = f":{node.start_mark.line + 1}" if node is not None else ""
        where = f" {key_path}:" if key_path else ""
        self.problems.append(f"{self.path}{line}:{where} {message}")

    def count_visit(self) -> bool:
        """Charge one node visit; False once the budget is spent (alias bomb)."""
        self._visited += 1
        if self._visited == MAX_NODES_VISITED + 1:
            self.problem(
                None, "", f"document expands to more than {MAX_NODES_VISITED} nodes "
                "(anchors/aliases nested too deeply?); write the values out plainly"
            )
        return self._visited <= MAX_NODES_VISITED

    def root_mapping(self) -> Section:
        if not isinstance(self.root, MappingNode):
            self.problem(self.root, "", "the file must hold a mapping of keys at the top level")
            return Section(self, None, "")
        return Section(self, self.root, "")

    def raise_if_problems(self) -> None:
        if self.problems:
            raise ConfigError(self.problems)


def read_yaml_file(path: str | Path) -> YamlDocument:
    """Read and compose a YAML file safely; syntax and encoding errors raise ConfigError."""
    shown = str(path)
    try:
        raw = Path(path).read_bytes()
    except FileNotFoundError:
        raise ConfigError([f"{shown}: file not found; check the path"]) from None
    except OSError as exc:
        raise ConfigError([f"{shown}: cannot read ({exc.strerror}); check permissions"]) from None
    return parse_yaml_bytes(raw, shown)


def parse_yaml_bytes(raw: bytes, shown: str) -> YamlDocument:
    """Compose YAML from bytes (strict UTF-8, size-limited) without constructing objects."""
    if len(raw) > MAX_FILE_BYTES:
        raise ConfigError([f"{shown}: file is larger than {MAX_FILE_BYTES} bytes; is it YAML?"])
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise ConfigError(
            [f"{shown}:{line}: not valid UTF-8 (byte {exc.start}); save the file as UTF-8"]
        ) from None
    try:
        root = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        where = f":{mark.line + 1}" if mark is not None else ""
        what = exc.problem or exc.context or "syntax error"
        raise ConfigError([f"{shown}{where}: YAML syntax error: {what}"]) from None
    except yaml.reader.ReaderError as exc:  # a control character YAML does not allow
        line = text.count("\n", 0, exc.position) + 1
        char = exc.character
        code = char if isinstance(char, int) else ord(str(char)[:1] or "?")
        raise ConfigError([(f"{shown}:{line}: character U+{code:04X} is not allowed in YAML; "
                            "remove it (or quote it as an escape, e.g. \"\\x00\")")]) from None
    except yaml.YAMLError as exc:
        raise ConfigError([f"{shown}: YAML error: {' '.join(str(exc).split())}"]) from None
    except RecursionError:
        raise ConfigError([(f"{shown}: YAML nested too deeply; write the values out with less "
                            "nesting")]) from None
    refuse_foreign_tags(root, shown)
    return YamlDocument(shown, root)


# Collection tags the getters accept; scalars' are ``_PLAIN_TAGS``.
_COLLECTION_TAGS = frozenset({"tag:yaml.org,2002:map", "tag:yaml.org,2002:seq"})
# The merge key ('<<') passes here so the getters can refuse it with their own message.
_SCALAR_TAGS = _PLAIN_TAGS | {"tag:yaml.org,2002:merge"}


def refuse_foreign_tags(root: Node | None, shown: str) -> None:
    """ConfigError naming every node whose tag is not a YAML core tag (``!!python/...`` on a
    list or mapping too, which the getters alone would read as a plain collection).

    Each composed node is visited once (aliases share nodes), so an alias bomb
    costs no more than its text.
    """
    problems: list[tuple[int, str]] = []
    seen: set[int] = set()
    stack = [root] if root is not None else []
    while stack:
        node = stack.pop()
        if id(node) in seen:
            continue
        seen.add(id(node))
        allowed = _SCALAR_TAGS if isinstance(node, ScalarNode) else _COLLECTION_TAGS
        if node.tag not in allowed:
            line = node.start_mark.line + 1
            problems.append((line, (f"{shown}:{line}: the tag '{node.tag}' is not supported; "
                                   "write a plain value, list or mapping")))
        if isinstance(node, SequenceNode):
            stack.extend(node.value)
        elif isinstance(node, MappingNode):
            stack.extend(part for pair in node.value for part in pair)
    if problems:
        raise ConfigError([text for _, text in sorted(problems)])


def suggest(word: str, choices: list[str]) -> str:
    """A ' (did you mean ...?)' hint for a misspelled key, or ''."""
    near = near_name(word, choices)
    return f" (did you mean '{near}'?)" if near else ""



_QUANTITY = re.compile(r"^\s*([-+]?[0-9]*\.?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*([A-Za-z/]*)\s*$")
_PERCENT = re.compile(r"^\s*([-+]?[0-9]*\.?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*%\s*$")
_PREFIX = {
    "": 1.0, "k": 1e3, "K": 1e3, "M": 1e6, "G": 1e9, "T": 1e12,
    "m": 1e-3, "u": 1e-6, "µ": 1e-6, "n": 1e-9, "p": 1e-12, "f": 1e-15,
}
_BINARY = {"Ki": 2**10, "Mi": 2**20, "Gi": 2**30, "Ti": 2**40}


# Where a figure in each base unit usually lies, for suggesting the unit of a bare number:
# model-level figures (a latency, an energy per inference, a buffer). Callers with a
# narrower sense of a key (a target's energy per MAC) pass their own range.
TYPICAL: dict[str, tuple[float, float]] = {
    "s": (1e-6, 10.0), "J": (1e-9, 10.0), "W": (1e-6, 100.0), "Hz": (1e6, 1e10),
    "B": (1024.0, 2.0**34), "B/s": (1e7, 1e13),
}
_SI_STEPS = ("f", "p", "n", "u", "m", "", "k", "M", "G", "T")
_BINARY_STEPS = ("", "Ki", "Mi", "Gi", "Ti")


def unit_suggestion(number: float, unit: str, typical: tuple[float, float] | None = None) -> str:
    """'0.6 pJ' for a bare 0.6 meant as an energy per MAC: the prefix that puts ``number``
    inside the typical range of ``unit`` (nearest its middle), else ``number`` in ``unit``."""
    low, high = typical or TYPICAL.get(unit, (0.0, math.inf))
    steps = _BINARY_STEPS if unit == "B" else _SI_STEPS
    scales = {p: float(_BINARY[p]) if p in _BINARY else _PREFIX[p] for p in steps}
    fits = [p for p in steps if low <= abs(number) * scales[p] <= high]
    if not fits or number == 0:
        return f"{number:g} {unit}"
    middle = math.sqrt(low * high) if math.isfinite(high) and low > 0 else 1.0
    best = min(fits, key=lambda p: abs(math.log(abs(number) * scales[p] / middle)))
    return f"{number:g} {best}{unit}"


def parse_quantity(text: str, unit: str) -> float | None:
    """Parse '4 MiB', '1.2 GHz', '25.6 GB/s', '0.2 pJ', '3e9' in the given base unit.

    ``unit`` is the base unit expected (``B``, ``Hz``, ``B/s``, ``J``, ``W``, ``s``);
    a bare number is taken in that unit. Returns None when the text does not parse
    or names another unit.
    """
    match = _QUANTITY.match(text.replace("µ", "u"))
    if not match:
        return None
    number, suffix = float(match.group(1)), match.group(2)
    if suffix == "" or suffix == unit:
        return number
    if not suffix.endswith(unit):
        return None
    prefix = suffix[: len(suffix) - len(unit)]  # not suffix[:-0] (== "") for a unitless count
    if prefix in _BINARY:
        return number * _BINARY[prefix]
    if prefix in _PREFIX:
        return number * _PREFIX[prefix]
    return None


class Section:
    """A YAML mapping being read: typed getters record problems instead of raising.

    Every getter marks its key as known; ``finish()`` then reports the keys
    nobody asked for, with a suggestion for likely typos.
    """

    def __init__(self, doc: YamlDocument, node: MappingNode | None, key_path: str) -> None:
        self.doc = doc
        self.node = node
        self.key_path = key_path
        self._known: list[str] = []
        self._items: dict[str, tuple[ScalarNode, Node]] = {}
        if node is not None:
            self._index(node)

    # -- plumbing -------------------------------------------------------
    def _index(self, node: MappingNode) -> None:
        for key_node, value_node in node.value:
            if not self.doc.count_visit():
                return
            if not isinstance(key_node, ScalarNode):
                self.doc.problem(key_node, self.key_path, "keys must be plain names")
                continue
            key = str(key_node.value)
            if key == "<<":
                self.doc.problem(key_node, self.key_path, "merge keys ('<<') are not supported")
                continue
            if key in self._items:
                self.doc.problem(key_node, self._path(key), "duplicate key")
                continue
            self._items[key] = (key_node, value_node)

    def _path(self, key: str) -> str:
        return f"{self.key_path}.{key}" if self.key_path else key

    def keys(self) -> list[str]:
        return list(self._items)

    def has(self, key: str) -> bool:
        return key in self._items

    def line_of(self, key: str) -> int | None:
        item = self._items.get(key)
        return item[0].start_mark.line + 1 if item else None

    def _value_node(self, key: str, required: bool) -> Node | None:
        self._known.append(key)
        item = self._items.get(key)
        if item is None:
            if required:
                where = self.node if self.node is not None else None
                self.doc.problem(where, self._path(key), "required key is missing")
            return None
        return item[1]

    def _scalar(self, key: str, required: bool) -> tuple[ScalarNode | None, Any]:
        node = self._value_node(key, required)
        if node is None:
            return None, _MISSING
        if not isinstance(node, ScalarNode):
            self.doc.problem(node, self._path(key), "expected a single value, not a list or mapping")
            return None, _MISSING
        if node.tag not in _PLAIN_TAGS:
            self.doc.problem(node, self._path(key),
                             f"the tag '{node.tag}' is not supported; write a plain value")
            return None, _MISSING
        value = _construct_scalar(node)
        if isinstance(value, int) and not isinstance(value, bool) and abs(value) > INT64_MAX:
            self.doc.problem(node, self._path(key), f"a {len(str(abs(value)))}-digit number is "
                             f"too large (at most {INT64_MAX})")
            return None, _MISSING
        return node, value

    def bad(self, key: str, message: str) -> None:
        """Record a problem on a key of this section (for checks the getters cannot do)."""
        item = self._items.get(key)
        self.doc.problem(item[1] if item else self.node, self._path(key), message)

    # -- typed getters --------------------------------------------------
    def get_str(self, key: str, default: str | None = None, *, required: bool = False,
                choices: list[str] | None = None) -> str | None:
        node, value = self._scalar(key, required)
        if value is _MISSING:
            return default
        if value is None or isinstance(value, (dict, list)):
            self.doc.problem(node, self._path(key), "expected text")
            return default
        text = str(value)
        if choices is not None and text not in choices:
            self.doc.problem(node, self._path(key),
                             f"'{text}' is not one of {', '.join(choices)}{suggest(text, choices)}")
            return default
        return text

    def get_bool(self, key: str, default: bool | None = None, *, required: bool = False) -> bool | None:
        node, value = self._scalar(key, required)
        if value is _MISSING:
            return default
        if not isinstance(value, bool):
            self.doc.problem(node, self._path(key), "expected true or false")
            return default
        return value

    def get_int(self, key: str, default: int | None = None, *, required: bool = False,
                minimum: int | None = None) -> int | None:
        node, value = self._scalar(key, required)
        if value is _MISSING:
            return default
        if isinstance(value, bool) or not isinstance(value, int):
            self.doc.problem(node, self._path(key), f"expected a whole number, got '{_text(node)}'")
            return default
        if minimum is not None and value < minimum:
            self.doc.problem(node, self._path(key), f"must be at least {minimum}")
            return default
        return value

    def get_number(self, key: str, default: float | None = None, *, required: bool = False,
                   minimum: float | None = None, maximum: float | None = None) -> float | None:
        node, value = self._scalar(key, required)
        if value is _MISSING:
            return default
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.doc.problem(node, self._path(key), f"expected a number, got '{_text(node)}'")
            return default
        return self._in_range(node, key, float(value), minimum, maximum, default)

    def get_quantity(self, key: str, unit: str, default: float | None = None, *,
                     required: bool = False, minimum: float | None = 0.0,
                     typical: tuple[float, float] | None = None) -> float | None:
        """A number with its SI/binary-prefixed unit, e.g. '4 MiB', '1.5 GHz', '0.6 pJ'.

        When ``unit`` is set (time, energy, power, size, bandwidth, frequency) the
        unit is required: a bare number (``energy_per_mac: 0.6``) would be read in
        base units (0.6 J) and is refused with a suggestion ('0.6 pJ', from
        ``typical``, the range the figure usually lies in). Zero needs no unit.
        """
        node, value = self._scalar(key, required)
        if value is _MISSING:
            return default
        bare = _bare_number(value)
        if unit and bare is not None and bare != 0:
            self.doc.problem(node, self._path(key), (
                f"a bare number needs its unit (did you mean "
                f"'{unit_suggestion(bare, unit, typical)}'?); a number alone would be read "
                f"in {unit}"))
            return default
        if isinstance(value, bool) or value is None:
            parsed = None
        elif isinstance(value, (int, float)):
            parsed = float(value)
        else:
            parsed = parse_quantity(str(value), unit)
        if parsed is None:
            expected = (f"a quantity in {unit} (e.g. '2 M{unit}')" if unit
                        else "a number (e.g. 2000000 or '2 M')")
            self.doc.problem(node, self._path(key), f"expected {expected}, got '{_text(node)}'")
            return default
        return self._in_range(node, key, parsed, minimum, None, default)

    def get_percent(self, key: str, default: float | None = None, *, required: bool = False,
                    minimum: float | None = 0.0) -> float | None:
        """A percentage as a number of percent: ``10`` and ``'10%'`` both give 10.0."""
        return self._number_or_percent(key, default, required, "a percentage like 10 or '10%'",
                                       per_percent=1.0, bounds=(minimum, None))

    def get_share(self, key: str, default: float | None = None, *, required: bool = False,
                  maximum: float = 1.0) -> float | None:
        """A share as a fraction (``0.3``) or a percentage (``'30%'``); returned as a fraction."""
        return self._number_or_percent(key, default, required, "a share like 0.3 or '30%'",
                                       per_percent=0.01, bounds=(0.0, maximum))

    def _number_or_percent(self, key: str, default: float | None, required: bool,
                           expected: str, *, per_percent: float,
                           bounds: tuple[float | None, float | None]) -> float | None:
        """A plain number, or 'N%' read as N x ``per_percent``; a problem otherwise."""
        node, value = self._scalar(key, required)
        if value is _MISSING:
            return default
        parsed: float | None = None
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            parsed = float(value)
        elif isinstance(value, str):
            match = _PERCENT.match(value)
            parsed = float(match.group(1)) * per_percent if match else None
        if parsed is None:
            self.doc.problem(node, self._path(key), f"expected {expected}, got '{_text(node)}'")
            return default
        return self._in_range(node, key, parsed, bounds[0], bounds[1], default)

    def get_date(self, key: str, default: date | None = None, *, required: bool = False) -> date | None:
        node, value = self._scalar(key, required)
        if value is _MISSING:
            return default
        if isinstance(value, date):
            return value
        self.doc.problem(node, self._path(key), f"expected a date like 2027-01-31, got '{_text(node)}'")
        return default

    def get_str_list(self, key: str, default: list[str] | None = None, *,
                     required: bool = False) -> list[str] | None:
        """A list of texts; a single text is accepted as a one-element list."""
        node = self._value_node(key, required)
        if node is None:
            return default
        if isinstance(node, ScalarNode):
            value = _construct_scalar(node)
            return [str(value)] if value is not None else default
        if not isinstance(node, SequenceNode):
            self.doc.problem(node, self._path(key), "expected a list of texts")
            return default
        out: list[str] = []
        for i, item in enumerate(node.value):
            if not self.doc.count_visit():
                return out
            if not isinstance(item, ScalarNode) or item.tag not in _PLAIN_TAGS:
                self.doc.problem(item, f"{self._path(key)}[{i}]", "expected text")
                continue
            out.append(str(_construct_scalar(item)))
        return out

    def get_section(self, key: str, *, required: bool = False) -> Section | None:
        node = self._value_node(key, required)
        if node is None:
            return None
        if not isinstance(node, MappingNode):
            self.doc.problem(node, self._path(key), "expected a mapping of keys")
            return None
        return Section(self.doc, node, self._path(key))

    def get_sections(self, key: str, *, required: bool = False) -> list[Section]:
        """A list of mappings (e.g. ``rules:``), each with its index in the key path."""
        node = self._value_node(key, required)
        if node is None:
            return []
        if not isinstance(node, SequenceNode):
            self.doc.problem(node, self._path(key), "expected a list")
            return []
        out = []
        for i, item in enumerate(node.value):
            if not self.doc.count_visit():
                break
            if not isinstance(item, MappingNode):
                self.doc.problem(item, f"{self._path(key)}[{i}]", "expected a mapping of keys")
                continue
            out.append(Section(self.doc, item, f"{self._path(key)}[{i}]"))
        return out

    def get_mapping_sections(self, key: str) -> Iterator[tuple[str, Section | None, Node]]:
        """Iterate a mapping whose keys are user-chosen names (e.g. ``dims: {batch: 1}``)."""
        section = self.get_section(key)
        if section is None:
            return
        section._known.extend(section.keys())
        for name, (_, value_node) in section._items.items():
            sub = Section(self.doc, value_node, section._path(name)) if isinstance(
                value_node, MappingNode) else None
            yield name, sub, value_node

    def free_keys(self) -> Section:
        """Mark every key of this section as known (a user-named mapping); returns self."""
        self._known.extend(self._items)
        return self

    def finish(self) -> None:
        """Report keys that no getter asked for, with a suggestion for typos."""
        for key, (key_node, _) in self._items.items():
            if key not in self._known:
                hint = suggest(key, sorted(set(self._known)))
                self.doc.problem(key_node, self._path(key), f"unknown key{hint}")

    def _in_range(self, node: Node | None, key: str, value: float, minimum: float | None,
                  maximum: float | None, default: float | None) -> float | None:
        if isinstance(value, float) and not math.isfinite(value):  # NaN or infinite
            self.doc.problem(node, self._path(key), "must be a finite number")
            return default
        if minimum is not None and value < minimum:
            self.doc.problem(node, self._path(key), f"must be at least {minimum:g}")
            return default
        if maximum is not None and value > maximum:
            self.doc.problem(node, self._path(key), f"must be at most {maximum:g}")
            return default
        return value


def _bare_number(value: Any) -> float | None:
    """``value`` as a number when it is one written without a unit ('0.6', 0.6), else None."""
    if isinstance(value, bool):
        return None
    number = None
    if isinstance(value, (int, float)):
        number = float(value)
    elif isinstance(value, str):
        match = _QUANTITY.match(value)
        number = float(match.group(1)) if match and not match.group(2) else None
    return number if number is not None and math.isfinite(number) else None


def _text(node: Node | None) -> str:
    """A node's source text for messages ('' when there is no node)."""
    return str(node.value) if isinstance(node, ScalarNode) else ""


def scalar_value(node: Node) -> Any:
    """The Python value of a scalar node (safe tags only), or None for non-scalars."""
    return _construct_scalar(node) if isinstance(node, ScalarNode) else None


def _construct_scalar(node: ScalarNode) -> Any:
    # SafeConstructor resolves only the standard tags (int, float, bool, null, str, timestamp).
    constructor = yaml.SafeLoader.__new__(yaml.SafeLoader)
    yaml.constructor.SafeConstructor.__init__(constructor)
    try:
        return constructor.construct_object(node, deep=True)
    except (yaml.constructor.ConstructorError, ValueError, OverflowError):
        return node.value
