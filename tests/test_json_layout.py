"""The deterministic JSON writer (``gate.jsontext.canonical_json``): content, rounding, layout.

The reference for content is the standard library: ``json.dumps`` with indent,
sorted keys and ASCII escapes of the value with every float rounded here to 12
significant digits (``float(f"{x:.12g}")``, no -0.0). The fast writer must read
back equal to it (``json.loads``) whatever the nesting: only whitespace may differ.
"""

from __future__ import annotations

import io
import json
import math
import re
from collections.abc import Mapping
from types import MappingProxyType
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from gate import jsontext
from gate.errors import InputError, InternalError
from gate.jsontext import canonical_json, canonical_json_pieces
from gate.report.jsonout import loads_result, render, result_document
from gate.snapshot import loads_snapshot, snapshot_to_dict
from tests.recordkit import HOSTILE_NAME, demo_result, layer, run


@pytest.fixture(autouse=True)
def _cold_memos(monkeypatch) -> None:
    """Each test starts with empty memos, so a value written by an earlier test cannot hide
    a wrong first rounding (the edge cases also write twice: the warm memo must agree)."""
    monkeypatch.setattr(jsontext, "_ROUNDED", {})
    monkeypatch.setattr(jsontext, "_FLOAT_TEXTS", {})
    monkeypatch.setattr(jsontext, "_KEY_TEXTS", {})


def _reference_rounded(value: Any) -> Any:
    """An independent copy of the rounding rule: floats to 12 significant digits, no -0.0."""
    if isinstance(value, bool) or value is None or isinstance(value, (int, str)):
        return value
    if isinstance(value, float):
        rounded = float(f"{value:.12g}")
        return 0.0 if rounded == 0 else rounded
    if isinstance(value, Mapping):
        return {str(k): _reference_rounded(v) for k, v in value.items()}
    return [_reference_rounded(v) for v in value]


def _old_layout(value: Any) -> str:
    """What the standard library writes with indent: one key or item per line everywhere
    (the earlier layout kept only flat containers on one line; readers saw the same JSON)."""
    return json.dumps(_reference_rounded(value), indent=2, sort_keys=True, ensure_ascii=True,
                      allow_nan=False) + "\n"


_scalars = (st.none() | st.booleans() | st.integers(min_value=-2**80, max_value=2**80)
            | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=8))
_json_values = st.recursive(
    _scalars,
    lambda inner: st.lists(inner, max_size=4) | st.tuples(inner, inner)
    | st.dictionaries(st.text(max_size=6), inner, max_size=4),
    max_leaves=20)


@settings(max_examples=400, deadline=None)
@given(_json_values)
def test_any_nesting_reads_back_equal_to_the_standard_encoder(value) -> None:
    text = canonical_json(value)
    assert json.loads(text) == json.loads(_old_layout(value))
    assert text.endswith("\n") and text.isascii() and "##" not in text


@settings(max_examples=200, deadline=None)
@given(_json_values)
def test_every_one_line_value_is_written_as_the_encoder_writes_it(value) -> None:
    # Whitespace outside strings is the only freedom: with it removed, both texts agree.
    strip = re.compile(r'("(?:[^"\\]|\\.)*")|\s+')
    ours = strip.sub(lambda m: m.group(1) or "", canonical_json(value))
    reference = strip.sub(lambda m: m.group(1) or "", _old_layout(value))
    assert ours == reference


def _nested_result_document() -> dict[str, Any]:
    return result_document(demo_result())  # runs, diffs with deltas, verdicts with findings


def test_a_result_with_nested_structures_reads_back_equal_to_the_old_writers_output() -> None:
    document = _nested_result_document()
    assert json.loads(canonical_json(document)) == json.loads(_old_layout(document))
    old_text = _old_layout(document)  # an old-layout result file still reads
    assert render(loads_result(old_text)) == render(demo_result())


def test_an_old_layout_snapshot_reads_as_the_new_one() -> None:
    runs = (run(), run("models/b.onnx", layers=(layer(HOSTILE_NAME),)))
    new_text = canonical_json(snapshot_to_dict(runs))
    old_text = _old_layout(snapshot_to_dict(runs))
    assert old_text != new_text and old_text.count("\n") > 3 * new_text.count("\n")
    assert loads_snapshot(old_text) == loads_snapshot(new_text)


def test_one_layer_per_line() -> None:
    names = ["stem/conv", "stage1/relu", "head/gemm"]
    lines = canonical_json(snapshot_to_dict([run()])).splitlines()
    for name in names:  # each layer, with its metrics, on exactly one line
        (line,) = [text for text in lines if f'"name": "{name}"' in text]
        assert '"metrics": {' in line and '"fused_ops": [' in line
        assert line.startswith("        {") and line.endswith(("},", "}"))
    assert any(line.startswith('      "metrics": {') for line in lines)  # run totals: flat
    text = canonical_json(_nested_result_document())
    deltas = [line for line in text.splitlines() if '"deltas": {' in line]
    assert deltas and all('"head_name": ' in line for line in deltas)  # a layer change: a row


def test_an_object_holding_a_list_of_objects_is_not_one_line() -> None:
    value = {"rows": [{"name": "a", "findings": [{"x": 1.0}, {"x": 2.0}]}]}
    assert canonical_json(value) == (
        '{\n'
        '  "rows": [\n'
        '    {\n'
        '      "findings": [\n'
        '        {"x": 1.0},\n'
        '        {"x": 2.0}\n'
        '      ],\n'
        '      "name": "a"\n'
        '    }\n'
        '  ]\n'
        '}\n')


@pytest.mark.parametrize(("value", "written"), [
    (-0.0, "0.0"),
    (1e-300, "1e-300"),
    (5e-324, "5e-324"),  # the smallest subnormal keeps its value
    (0.1 + 0.2, "0.3"),
    (1.0 / 3.0, "0.333333333333"),
    (123456789012345.0, "123456789012000.0"),
    (1e16, "1e+16"),
    (2**70, str(2**70)),  # ints are exact, whatever their size
    (-(2**70), str(-(2**70))),
    (True, "true"),  # a bool is not an int here
    (False, "false"),
    (None, "null"),
])
def test_rounding_edge_cases_in_every_position(value, written) -> None:
    # The same rule wherever the value sits: alone, in a flat object, in a flat list, in a
    # row (an object in a list), in an object nested in a row, in a list nested in a row.
    expected_line = {
        "alone": f"{written}\n",
        "flat_object": f'{{"v": {written}}}\n',
        "flat_list": f"[{written}, 1]\n",
    }
    assert canonical_json(value) == expected_line["alone"]
    assert canonical_json({"v": value}) == expected_line["flat_object"]
    assert canonical_json([value, 1]) == expected_line["flat_list"]
    rows = {"t": [{"v": value, "m": {"v": value}, "l": [value]}]}
    row_line = f'{{"l": [{written}], "m": {{"v": {written}}}, "v": {written}}}'
    assert row_line in canonical_json(rows)
    assert row_line in canonical_json(rows)  # again, from the memos
    assert canonical_json(value) == expected_line["alone"]


def test_a_bool_is_not_counted_as_the_int_it_equals() -> None:
    text = canonical_json({"t": [{"a": True, "b": 1, "c": 1.0}], "f": [False, 0, 0.0]})
    assert json.loads(text) == {"t": [{"a": True, "b": 1, "c": 1.0}], "f": [False, 0, 0.0]}
    assert type(json.loads(text)["t"][0]["a"]) is bool


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
@pytest.mark.parametrize("where", ["alone", "flat", "list", "row", "nested_row", "deep"])
def test_non_finite_numbers_are_refused_anywhere(bad, where) -> None:
    value = {"alone": bad, "flat": {"a": 1, "b": bad}, "list": [1.0, bad],
             "row": {"t": [{"x": bad}]}, "nested_row": {"t": [{"m": {"x": bad}}]},
             "deep": {"t": [{"u": [{"x": [1, bad]}]}]}}[where]
    with pytest.raises(InternalError, match="non-finite"):
        canonical_json(value)


def test_unusual_types_are_written_as_the_plain_ones() -> None:
    class Ratio(float):
        pass

    class Count(int):
        pass

    value = {"t": [{"m": MappingProxyType({"r": Ratio(1 / 3), "c": Count(7)}),
                    "l": (Ratio(-0.0), 2)}],
             "flat": MappingProxyType({"r": Ratio(2 / 3)}), 1: "int key"}
    assert json.loads(canonical_json(value)) == json.loads(_old_layout(value))


@pytest.mark.parametrize("piece_chars", [1, 64, 1 << 20])
def test_pieces_end_at_line_ends_and_defuse_markers_across_them(monkeypatch,
                                                                 piece_chars) -> None:
    monkeypatch.setattr(jsontext, "PIECE_CHARS", piece_chars)
    value = {"t": [{"name": f"##[error] layer {i} ##vso[x]", "v": i / 7} for i in range(50)]}
    pieces = list(canonical_json_pieces(value))
    assert len(pieces) > 10 or piece_chars > 10_000
    assert all(piece.endswith("\n") for piece in pieces)
    assert "".join(pieces) == canonical_json(value)
    assert "##" not in "".join(pieces)
    assert json.loads("".join(pieces)) == _reference_rounded(value)


def test_the_rounding_memo_stays_bounded_and_exact(monkeypatch) -> None:
    monkeypatch.setattr(jsontext, "_ROUNDED", {})
    monkeypatch.setattr(jsontext, "_ROUNDED_MAX", 8)
    values = [i / 7 for i in range(1, 40)]
    first = json.loads(canonical_json({"v": values}))["v"]
    assert len(jsontext._ROUNDED) <= 8
    assert json.loads(canonical_json({"v": values}))["v"] == first == [
        float(f"{v:.12g}") for v in values]


@pytest.mark.parametrize("enabled", [True, False])
def test_the_cyclic_collector_is_left_as_it_was(enabled) -> None:
    import gc

    was = gc.isenabled()
    try:
        (gc.enable if enabled else gc.disable)()
        pieces = canonical_json_pieces({"t": [{"v": 1.5}]})
        next(pieces)
        assert gc.isenabled() is enabled  # never paused across a yield
        with pytest.raises(InternalError):
            canonical_json({"t": [{"v": math.nan}]})
        assert gc.isenabled() is enabled
    finally:
        (gc.enable if was else gc.disable)()


def test_readers_and_writers_pause_the_collector_and_restore_it(tmp_path, monkeypatch) -> None:
    import gc

    from gate.report.jsonout import REPORTER
    from gate.snapshot import write_snapshot

    states: list[bool] = []
    real_loads = json.loads

    def watching_loads(*args, **kwargs):
        states.append(gc.isenabled())
        return real_loads(*args, **kwargs)

    monkeypatch.setattr(json, "loads", watching_loads)
    assert gc.isenabled()
    text = render(demo_result())
    loads_result(text)
    write_snapshot([run()], str(tmp_path / "base.json"))
    loads_snapshot((tmp_path / "base.json").read_text(encoding="utf-8"))
    REPORTER.write(demo_result(), io.StringIO())
    assert states == [False, False]  # both reads parsed with the collector paused
    assert gc.isenabled()  # and every reader and writer left it on
    with pytest.raises(InputError):
        loads_result("[")
    assert gc.isenabled()


_plain = (st.none() | st.booleans() | st.integers(min_value=-2**80, max_value=2**80)
          | st.floats(allow_nan=False, allow_infinity=False) | st.text(max_size=6))
_rows = st.recursive(
    st.dictionaries(st.text(max_size=5), _plain, max_size=5),
    lambda inner: st.dictionaries(
        st.text(max_size=5), _plain | inner | st.lists(_plain, max_size=3)
        | st.lists(inner, max_size=2), max_size=5),
    max_leaves=16)


@settings(max_examples=400, deadline=None)
@given(_rows)
def test_a_rows_text_is_what_the_general_way_writes(row) -> None:
    # Rows are written from memoised pieces (jsontext._row_text); the general way rounds
    # a copy and hands it to the C encoder. Same bytes, and the same rows count as rows.
    general = jsontext._row(row)
    text = jsontext._row_text(row)
    assert text is not jsontext._UNUSUAL  # plain types only here
    assert text == (None if general is None else jsontext.encode_one_line(general))


@settings(max_examples=300, deadline=None)
@given(_rows)
def test_the_one_line_encoder_writes_what_the_standard_library_writes(row) -> None:
    # profile --format json and every one-line value use jsontext.encode_one_line (a C
    # encoder built once); reference: json.dumps with the same settings (Python stdlib).
    assert jsontext.encode_one_line(row) == json.dumps(
        row, sort_keys=True, separators=(", ", ": "), ensure_ascii=True, allow_nan=False)


@pytest.mark.parametrize("bad", [float("nan"), float("inf"), -float("inf")])
def test_the_one_line_encoder_refuses_non_finite_numbers(bad: float) -> None:
    with pytest.raises(ValueError, match="not JSON compliant"):
        jsontext.encode_one_line({"macs": 1, "intensity": [bad]})


@settings(max_examples=200, deadline=None)
@given(st.lists(_rows, min_size=1, max_size=7), _rows, st.integers(min_value=1, max_value=9))
def test_shares_of_a_document_joined_are_the_whole_document(items, rest, parts) -> None:
    """The JSON report is rendered in shares side by side (-j N); each share's document
    holds only its own items (None elsewhere). Joined, the shares are the whole text."""
    items = [{"entry": item, "layers": [item, {}]} for item in items]  # containers: not a row
    whole = jsontext.canonical_json({"head": rest, "result": {"entries": items, "z": 1}})
    shares = jsontext.even_shares(len(items), min(parts, len(items)))
    joined = []
    for k, share in enumerate(shares):
        mine = [item if i in share else None for i, item in enumerate(items)]
        document = {"head": rest, "result": {"entries": mine, "z": 1}}
        joined += jsontext.canonical_json_share(document, mine, share, first=k == 0,
                                                last=k == len(shares) - 1)
    assert "".join(joined) == whole


@given(st.integers(min_value=0, max_value=50), st.integers(min_value=-2, max_value=60))
def test_even_shares_cover_every_item_once_in_order(count, parts) -> None:
    shares = jsontext.even_shares(count, parts)
    assert len(shares) == max(1, min(parts, count))  # one share even of nothing
    assert [i for share in shares for i in share] == list(range(count))
    assert max(map(len, shares)) - min(map(len, shares)) <= 1


def test_a_share_refuses_a_list_that_appears_twice() -> None:
    items = [{"a": [{"b": 1}]}, {"a": [{"b": 2}]}]
    document = {"one": items, "two": items}
    with pytest.raises(InternalError, match="appears in it twice"):
        "".join(jsontext.canonical_json_share(document, items, range(1), first=True,
                                              last=False))


def test_a_row_holding_another_type_goes_the_general_way() -> None:
    class Ratio(float):
        pass

    rows = {"t": [{"r": Ratio(1 / 3), "m": {"x": -0.0}}, {"r": 0.5, "m": {"x": 1e-300}}]}
    assert jsontext._row_text(rows["t"][0]) is jsontext._UNUSUAL
    lines = canonical_json(rows).splitlines()
    assert lines[2] == '    {"m": {"x": 0.0}, "r": 0.333333333333},'
    assert lines[3] == '    {"m": {"x": 1e-300}, "r": 0.5}'


def test_the_text_memos_stay_bounded(monkeypatch) -> None:
    monkeypatch.setattr(jsontext, "_FLOAT_TEXTS", {})
    monkeypatch.setattr(jsontext, "_KEY_TEXTS", {})
    monkeypatch.setattr(jsontext, "_TEXT_MEMO_MAX", 8)
    rows = {"t": [{f"k{i}": i / 7} for i in range(1, 40)]}
    first = canonical_json(rows)
    assert len(jsontext._FLOAT_TEXTS) <= 8 and len(jsontext._KEY_TEXTS) <= 8
    assert canonical_json(rows) == first
    assert json.loads(first) == _reference_rounded(rows)
