"""The shared validating YAML reader: line numbers, key paths, typos, duplicates, bombs, bytes."""

from __future__ import annotations

import resource
from collections.abc import Callable
from datetime import date
from pathlib import Path

import pytest

from gate.errors import ConfigError
from gate.yamlconf import (
    MAX_FILE_BYTES,
    MAX_NODES_VISITED,
    Section,
    parse_quantity,
    parse_yaml_bytes,
    read_yaml_file,
)


def _problems(text: str | bytes, read: Callable[[Section], object]) -> list[str]:
    """Run ``read(root_section)`` over ``text``; the problems it recorded, in order."""
    raw = text.encode("utf-8") if isinstance(text, str) else text
    doc = parse_yaml_bytes(raw, "conf.yaml")
    root = doc.root_mapping()
    read(root)
    root.finish()
    with pytest.raises(ConfigError) as info:
        doc.raise_if_problems()
    return info.value.problems


def _raises(raw: bytes) -> str:
    with pytest.raises(ConfigError) as info:
        parse_yaml_bytes(raw, "conf.yaml")
    return info.value.problems[0]


# --- syntax and encoding ---------------------------------------------------------

@pytest.mark.parametrize(("raw", "expected"), [
    (b"a: 1\nb: [1, 2\nc: 3\n", "conf.yaml:3: YAML syntax error"),  # unclosed flow sequence
    (b"a: 1\n  b: 2\n", "conf.yaml:2: YAML syntax error"),  # bad indentation
    (b"a: 'open\n", "conf.yaml:2: YAML syntax error"),  # unterminated quote (found at EOF)
    (b"a: *nowhere\n", "conf.yaml:1: YAML syntax error"),  # undefined alias
    (b"name: ok\n\xff\xfe: bad\n", "conf.yaml:2: not valid UTF-8 (byte 9)"),
    (b"\xc3\x28: x\n", "conf.yaml:1: not valid UTF-8 (byte 0)"),  # invalid 2-byte sequence
])
def test_syntax_and_encoding_errors_name_file_and_line(raw: bytes, expected: str) -> None:
    assert _raises(raw).startswith(expected)


def test_oversized_file_is_refused_before_parsing() -> None:
    assert "larger than" in _raises(b"#" * (MAX_FILE_BYTES + 1))


def test_missing_file_and_directory_give_one_line(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="file not found"):
        read_yaml_file(tmp_path / "nope.yaml")
    with pytest.raises(ConfigError, match="cannot read"):
        read_yaml_file(tmp_path)


def test_python_tags_are_refused_not_constructed() -> None:
    # PyYAML documents that only safe_load/SafeLoader refuse python/* tags (from memory); the
    # reader goes further and refuses any non-core tag, on a value, a list or a mapping, with
    # one message per node, before any getter runs.
    text = ("x: !!python/name:os.system\nn: !!python/object/apply:os.getpid []\n"
            "m: !!python/object:os.X {a: 1}\n")
    with pytest.raises(ConfigError) as info:
        parse_yaml_bytes(text.encode("utf-8"), "conf.yaml")
    assert info.value.problems == [
        f"conf.yaml:{line}: the tag 'tag:yaml.org,2002:python/{tag}' is not supported; "
        "write a plain value, list or mapping"
        for line, tag in ((1, "name:os.system"), (2, "object/apply:os.getpid"),
                          (3, "object:os.X"))
    ]


# --- types, unknown keys, duplicates -------------------------------------------

@pytest.mark.parametrize(("text", "getter", "expected"), [
    ("n: ten\n", lambda r: r.get_int("n"), "conf.yaml:1: n: expected a whole number, got 'ten'"),
    ("n: 1.5\n", lambda r: r.get_int("n"), "conf.yaml:1: n: expected a whole number, got '1.5'"),
    ("n: true\n", lambda r: r.get_number("n"), "conf.yaml:1: n: expected a number, got 'true'"),
    ("b: yes please\n", lambda r: r.get_bool("b"), "conf.yaml:1: b: expected true or false"),
    ("s: [1, 2]\n", lambda r: r.get_str("s"),
     "conf.yaml:1: s: expected a single value, not a list or mapping"),
    ("d: 31/01/2027\n", lambda r: r.get_date("d"),
     "conf.yaml:1: d: expected a date like 2027-01-31, got '31/01/2027'"),
    ("q: 4 parsecs\n", lambda r: r.get_quantity("q", "B"),
     "conf.yaml:1: q: expected a quantity in B (e.g. '2 MB'), got '4 parsecs'"),
    ("q: -1 KiB\n", lambda r: r.get_quantity("q", "B"), "conf.yaml:1: q: must be at least 0"),
    ("p: 130%\n", lambda r: r.get_share("p"), "conf.yaml:1: p: must be at most 1"),
    ("p: lots\n", lambda r: r.get_share("p"),
     "conf.yaml:1: p: expected a share like 0.3 or '30%', got 'lots'"),
    ("x: .nan\n", lambda r: r.get_number("x"), "conf.yaml:1: x: must be a finite number"),
    ("k: v\n", lambda r: r.get_str("mode", required=True),
     "conf.yaml:1: mode: required key is missing"),
    ("c: {a: 1}\n", lambda r: r.get_sections("c"), "conf.yaml:1: c: expected a list"),
    ("c: [1]\n", lambda r: r.get_sections("c"), "conf.yaml:1: c[0]: expected a mapping of keys"),
    ("choice: fast\n", lambda r: r.get_str("choice", choices=["faster", "slow"]),
     "conf.yaml:1: choice: 'fast' is not one of faster, slow (did you mean 'faster'?)"),
    ("a: 1\n<<: {b: 2}\n", lambda r: r.get_int("a"),
     "conf.yaml:2: merge keys ('<<') are not supported"),
    ("- a\n- b\n", lambda r: None,
     "conf.yaml:1: the file must hold a mapping of keys at the top level"),
])
def test_wrong_types_are_reported_with_line_and_key(text: str, getter: Callable[[Section], object],
                                                    expected: str) -> None:
    assert _problems(text, getter)[0] == expected


def test_unknown_keys_get_did_you_mean_and_nested_key_paths() -> None:
    text = "name: x\nclok: 1 GHz\nrules:\n  - id: a\n    severty: error\n"

    def read(root):
        root.get_str("name")
        root.get_quantity("clock", "Hz")
        for rule in root.get_sections("rules"):
            rule.get_str("id")
            rule.get_str("severity")
            rule.finish()

    assert _problems(text, read) == [
        "conf.yaml:5: rules[0].severty: unknown key (did you mean 'severity'?)",
        "conf.yaml:2: clok: unknown key (did you mean 'clock'?)",
    ]


def test_duplicate_keys_are_errors_not_last_one_wins() -> None:
    # YAML 1.2.2 spec, section 3.2.1.1: "the content of a mapping node is an unordered set of
    # key/value node pairs, with the restriction that each of the keys is unique".
    # PyYAML's safe_load silently keeps the last value; the reader must refuse instead.
    text = "a: 1\nb: 2\na: 3\nsub:\n  x: 1\n  x: 2\n"

    def read(root):
        root.get_int("a")
        root.get_int("b")
        sub = root.get_section("sub")
        sub.get_int("x")
        sub.finish()

    assert _problems(text, read) == ["conf.yaml:3: a: duplicate key",
                                     "conf.yaml:6: sub.x: duplicate key"]


def test_every_problem_of_a_file_is_reported_at_once() -> None:
    text = "a: x\nb: y\nc: z\nd: 1\n"
    problems = _problems(text, lambda r: [r.get_int(k) for k in "abc"])
    assert len(problems) == 4  # three bad ints and the unknown key 'd'


# --- alias bombs ---------------------------------------------------------------

def _billion_laughs(levels: int) -> bytes:
    """The classic entity-expansion attack written with YAML anchors: 10**levels leaves."""
    lines = ["a0: &a0 [lol, lol, lol, lol, lol, lol, lol, lol, lol, lol]"]
    for i in range(1, levels):
        refs = ", ".join([f"*a{i - 1}"] * 10)
        lines.append(f"a{i}: &a{i} [{refs}]")
    lines.append(f"bomb: *a{levels - 1}")
    return ("\n".join(lines) + "\n").encode()


@pytest.mark.parametrize("getter", [
    lambda r: r.get_str_list("bomb"),
    lambda r: r.get_sections("bomb"),
    lambda r: [r.get_str_list(f"a{i}") for i in range(9)],
])
def test_billion_laughs_is_refused_quickly_and_without_memory(getter) -> None:
    # The YAML form of the "billion laughs" entity-expansion attack (known from XML, CVE-2003-1564
    # class): nine nested anchors of ten references each would expand to 10**9 leaves.
    before_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux
    doc = parse_yaml_bytes(_billion_laughs(9), "bomb.yaml")
    root = doc.root_mapping()
    root.free_keys()
    getter(root)
    with pytest.raises(ConfigError, match="expected (text|a mapping of keys)"):  # never expanded
        doc.raise_if_problems()
    assert resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - before_kib < 200 * 1024


def test_recursive_reader_stops_at_the_node_budget() -> None:
    doc = parse_yaml_bytes(_billion_laughs(9), "bomb.yaml")
    visited = _expand(doc, doc.root)
    assert visited == MAX_NODES_VISITED  # stopped at the budget, not at 10**9
    with pytest.raises(ConfigError) as info:
        doc.raise_if_problems()
    assert info.value.problems == [
        (f"bomb.yaml: document expands to more than {MAX_NODES_VISITED} nodes "
        "(anchors/aliases nested too deeply?); write the values out plainly")]


def test_self_referencing_anchor_does_not_hang() -> None:
    doc = parse_yaml_bytes(b"a: &x [*x]\n", "loop.yaml")
    assert doc.root_mapping().get_str_list("a") == []
    assert doc.problems == ["loop.yaml:1: a[0]: expected text"]
    assert _expand(doc, doc.root) == MAX_NODES_VISITED - 2  # two visits charged by the getter


def _expand(doc, node) -> int:
    """Walk every node as a naive recursive reader would, charging the budget; nodes visited."""
    stack, visited = [node], 0
    while stack:
        current = stack.pop()
        if not doc.count_visit():
            return visited
        visited += 1
        if isinstance(current.value, list):
            for item in current.value:
                stack.extend(item if isinstance(item, tuple) else (item,))
    return visited


# --- quantities, shares, dates ---------------------------------------------------

@pytest.mark.parametrize(("text", "unit", "expected"), [
    # IEC 80000-13 binary prefixes: KiB = 2**10 B, MiB = 2**20 B, GiB = 2**30 B.
    ("4 MiB", "B", 4 * 2**20),
    ("512KiB", "B", 512 * 2**10),
    ("1 GiB", "B", 2**30),
    # SI decimal prefixes (BIPM SI Brochure, 9th edition, table 7).
    ("2 MB", "B", 2e6),
    ("1.5 GHz", "Hz", 1.5e9),
    ("25.6 GB/s", "B/s", 25.6e9),
    ("0.2 pJ", "J", 0.2e-12),
    ("5 ms", "s", 5e-3),
    ("800 us", "s", 800e-6),
    ("800 µs", "s", 800e-6),
    ("3e9", "Hz", 3e9),
    ("1M", "", 1e6),  # unitless counts take the SI prefix (was read as 1 before the fix)
    ("500k", "", 5e5),
    ("12", "", 12.0),
    ("4 MiB", "s", None),  # wrong unit
    ("4 XB", "B", None),  # unknown prefix
    ("fast", "Hz", None),
])
def test_parse_quantity(text: str, unit: str, expected: float | None) -> None:
    got = parse_quantity(text, unit)
    assert got == pytest.approx(expected) if expected is not None else got is None


@pytest.mark.parametrize(("value", "expected"), [
    ("0.3", 0.3), ("'30%'", 0.3), ("'12.5 %'", 0.125), ("0", 0.0), ("1", 1.0), ("'100%'", 1.0),
])
def test_get_share_accepts_fractions_and_percentages(value: str, expected: float) -> None:
    doc = parse_yaml_bytes(f"p: {value}\n".encode(), "conf.yaml")
    assert doc.root_mapping().get_share("p") == pytest.approx(expected)
    assert doc.problems == []


def test_get_date_reads_iso_dates() -> None:
    doc = parse_yaml_bytes(b"d: 2027-01-31\n", "conf.yaml")
    assert doc.root_mapping().get_date("d") == date(2027, 1, 31)
