"""Per-layer diffs: matching by name, then by signature, then by op type."""

from __future__ import annotations

import sys
from collections.abc import Callable
from dataclasses import replace
from itertools import pairwise

from hypothesis import given, settings
from hypothesis import strategies as st

from gate.diff import align, diff_runs, match_layers, ranked_changes, same_value
from tests.recordkit import layer, run


def _chain(prefix: str = "n") -> tuple:
    """A small CNN-like chain with repeated signatures (as real models have)."""
    return (
        layer(f"{prefix}conv0", "Conv", "1x8x32x32"),
        layer(f"{prefix}relu0", "Relu", "1x8x32x32", macs=0, param_bytes=0),
        layer(f"{prefix}conv1", "Conv", "1x16x16x16", macs=2000),
        layer(f"{prefix}relu1", "Relu", "1x16x16x16", macs=0, param_bytes=0),
        layer(f"{prefix}conv2", "Conv", "1x16x16x16", macs=3000),
        layer(f"{prefix}relu2", "Relu", "1x16x16x16", macs=0, param_bytes=0),
        layer(f"{prefix}fc", "Gemm", "1x256", macs=5000, param_bytes=4096),
    )


def _statuses(diff) -> list[tuple[str, str | None, str | None, str]]:
    return [(c.status, c.base_name, c.head_name, c.matched_by) for c in diff.layers]


def test_identical_runs_are_all_unchanged_and_matched_by_name() -> None:
    diff = diff_runs(run(layers=_chain()), run(layers=_chain()))
    assert {c.status for c in diff.layers} == {"unchanged"}
    assert {c.matched_by for c in diff.layers} == {"name"}
    assert all(c.deltas == {} for c in diff.layers)


def test_every_node_renamed_still_aligns_by_signature() -> None:
    diff = diff_runs(run(layers=_chain("old/")), run(layers=_chain("/export2/")))
    assert [(c.status, c.matched_by) for c in diff.layers] == [("unchanged", "signature")] * 7
    # Repeated signatures (two identical conv+relu blocks) pair up in order, not crosswise.
    assert [(c.base_name, c.head_name) for c in diff.layers][2:5] == [
        ("old/conv1", "/export2/conv1"), ("old/relu1", "/export2/relu1"),
        ("old/conv2", "/export2/conv2")]


def test_renamed_with_an_inserted_layer_reports_only_that_layer_added() -> None:
    head_layers = list(_chain("new_"))
    head_layers.insert(3, layer("new_bn", "BatchNormalization", "1x16x16x16", macs=0))
    diff = diff_runs(run(layers=_chain()), run(layers=tuple(head_layers)))
    assert [c.status for c in diff.layers].count("added") == 1
    assert diff.layers[3].status == "added" and diff.layers[3].head_name == "new_bn"
    assert diff.layers[3].deltas["param_bytes"] == (0, 256)
    assert {c.status for c in diff.layers} == {"unchanged", "added"}


def test_widened_layer_with_renamed_nodes_is_changed_not_added_and_removed() -> None:
    base = _chain("a_")
    head = list(_chain("b_"))
    head[4] = layer("b_conv2_wide", "Conv", "1x32x16x16", macs=6000, param_bytes=512)
    diff = diff_runs(run(layers=base), run(layers=tuple(head)))
    change = diff.layers[4]
    assert (change.status, change.base_name, change.head_name, change.matched_by) == (
        "changed", "a_conv2", "b_conv2_wide", "op_type")
    assert change.deltas["macs"] == (3000, 6000)
    assert change.deltas["param_bytes"] == (256, 512)
    assert "latency_s" not in change.deltas  # unchanged metrics are left out
    assert not any(c.status in ("added", "removed") for c in diff.layers)


def test_renumbered_name_on_another_op_is_not_matched_by_name() -> None:
    base = (layer("node_1", "Conv"), layer("node_2", "Relu", macs=0, param_bytes=0))
    head = (layer("node_1", "Relu", macs=0, param_bytes=0), layer("node_2", "Conv"))
    matched = match_layers(base, head)
    assert all(how != "name" for _, how in matched.values())


def test_removed_layer_is_listed_where_it_was() -> None:
    base = _chain()
    head = base[:2] + base[3:]  # drop "nconv1"
    diff = diff_runs(run(layers=base), run(layers=head))
    assert _statuses(diff)[2][:3] == ("removed", "nconv1", None)
    assert diff.layers[2].deltas["macs"] == (2000, 0)
    assert len(diff.layers) == len(base)


def test_duplicate_and_empty_names_fall_back_to_alignment() -> None:
    base = (layer("", "Conv"), layer("dup", "Relu", macs=0, param_bytes=0),
            layer("dup", "Relu", macs=0, param_bytes=0))
    head = (layer("", "Conv"), layer("dup", "Relu", macs=0, param_bytes=0),
            layer("dup", "Relu", macs=0, param_bytes=0))
    diff = diff_runs(run(layers=base), run(layers=head))
    assert [c.matched_by for c in diff.layers] == ["signature"] * 3
    assert {c.status for c in diff.layers} == {"unchanged"}


def test_totals_hold_every_model_metric_as_base_head_pairs() -> None:
    base, head = run(layers=_chain()), run(layers=_chain()[:-1])
    diff = diff_runs(base, head)
    assert set(diff.totals) == set(base.metrics)
    assert diff.totals["macs"] == (base.metrics["macs"], head.metrics["macs"])
    assert diff.totals["macs"][1] == diff.totals["macs"][0] - 5000


def test_snapshot_rounding_is_not_a_change() -> None:
    base = layer("x", latency_s=1.0 / 3.0)
    head = replace(base, metrics={**base.metrics, "latency_s": float(f"{1.0 / 3.0:.12g}")})
    diff = diff_runs(run(layers=(base,)), run(layers=(head,)))
    assert diff.layers[0].status == "unchanged"
    assert not same_value(1.0, 1.0 + 1e-6)
    assert same_value(0, 0.0) and not same_value(3, 4)


def test_ranked_changes_put_the_biggest_latency_change_first() -> None:
    base = _chain()
    head = list(base)
    head[2] = layer("nconv1", "Conv", "1x16x16x16", macs=2000, latency_s=5e-5)  # +40 us
    head[4] = layer("nconv2", "Conv", "1x16x16x16", macs=3000, latency_s=2e-5)  # +10 us
    head.append(layer("extra", "Relu", "1x9", macs=0, param_bytes=0, latency_s=2e-5))
    ranked = ranked_changes(diff_runs(run(layers=base), run(layers=tuple(head))))
    assert [c.head_name for c in ranked] == ["nconv1", "extra", "nconv2"]
    assert len(ranked_changes(diff_runs(run(layers=base), run(layers=tuple(head))), 1)) == 1


_ops = st.sampled_from(["Conv", "Relu", "Add", "Gemm"])
_shapes = st.sampled_from(["1x8", "1x16", "1x32"])


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(_ops, _shapes), min_size=0, max_size=12),
       st.lists(st.tuples(_ops, _shapes), min_size=0, max_size=12),
       st.booleans())
def test_every_layer_is_accounted_for_once(base_spec, head_spec, rename) -> None:
    base = tuple(layer(f"b{i}", op, shape) for i, (op, shape) in enumerate(base_spec))
    head = tuple(layer(f"{'h' if rename else 'b'}{i}", op, shape)
                 for i, (op, shape) in enumerate(head_spec))
    diff = diff_runs(run(layers=base), run(layers=head))
    assert [c.head_name for c in diff.layers if c.head_name is not None] == [l.name for l in head]
    assert sorted(c.base_name for c in diff.layers if c.base_name is not None) == sorted(
        l.name for l in base)
    for change in diff.layers:
        if change.matched_by == "name":
            assert change.base_name == change.head_name
    if base_spec == head_spec:
        assert {c.status for c in diff.layers} <= {"unchanged"}


# --- the alignment and the indexes: linear in the number of layers -------------------

def _lcs_length(a: list[str], b: list[str]) -> int:
    """Textbook dynamic-programming LCS length (Cormen et al., Introduction to Algorithms,
    section 15.4): the independent reference the fast alignment must reach."""
    table = [[0] * (len(b) + 1) for _ in range(len(a) + 1)]
    for i, x in enumerate(a):
        for j, y in enumerate(b):
            table[i + 1][j + 1] = table[i][j] + 1 if x == y else max(table[i][j + 1], table[i + 1][j])
    return table[len(a)][len(b)]


_symbols = st.lists(st.sampled_from("abc"), max_size=14)


@settings(max_examples=200, deadline=None)
@given(_symbols, _symbols)
def test_alignment_is_a_longest_common_subsequence(a, b) -> None:
    pairs = align(a, b)
    assert all(a[i] == b[j] for i, j in pairs)
    assert all(p[0] < q[0] and p[1] < q[1] for p, q in pairwise(pairs))  # in order
    assert len(pairs) == _lcs_length(a, b)


@settings(max_examples=60, deadline=None)
@given(_symbols, _symbols)
def test_alignment_past_the_edit_budget_stays_in_order(a, b) -> None:
    import gate.diff as diff_module

    saved = diff_module.MAX_EDITS
    diff_module.MAX_EDITS = 0  # force the greedy fallback on any difference
    try:
        pairs = align(a, b)
    finally:
        diff_module.MAX_EDITS = saved
    assert all(a[i] == b[j] for i, j in pairs)
    assert all(p[0] < q[0] and p[1] < q[1] for p, q in pairwise(pairs))


class _Counted(str):
    """A str that counts equality comparisons (dict lookups by the same object skip them)."""

    calls = 0

    def __eq__(self, other: object) -> bool:
        _Counted.calls += 1
        return str.__eq__(self, other)

    __hash__ = str.__hash__


def _renumbered_chain(size: int, insert_at: int) -> tuple[tuple, tuple]:
    """A Conv/Relu/Add chain of ``size`` layers and the same chain with one layer inserted
    and every node renumbered after it (what an exporter does): names pair nothing, so
    the whole graph goes through the signature alignment."""
    kinds = ("Conv", "Relu", "Add")
    base = tuple(layer(f"n{i}", kinds[i % 3], macs=0) for i in range(size))
    head_kinds = [kinds[i % 3] for i in range(size)]
    head_kinds.insert(insert_at, "Sigmoid")
    head = tuple(layer(f"n{i}", kind, macs=0) for i, kind in enumerate(head_kinds))
    counted = [tuple(replace(x, signature=_Counted(x.signature)) for x in side)
               for side in (base, head)]
    return counted[0], counted[1]


def _lines_run(func: Callable[[], object]) -> int:
    """How many Python lines ``func`` executes (``sys.settrace`` line events): a count of
    work that does not depend on the machine's speed, unlike a timer."""
    count = 0

    def tracer(frame: object, event: str, arg: object) -> Callable[..., object]:
        nonlocal count
        if event == "line":
            count += 1
        return tracer

    sys.settrace(tracer)
    try:
        func()
    finally:
        sys.settrace(None)
    return count


def _diff_lines(size: int, edits: int) -> int:
    base, head = _renumbered_chain(size, insert_at=size // 2)
    for k in range(1, edits):  # further insertions, spread over the graph
        at = k * size // edits
        head = head[:at] + (layer(f"extra{k}", "Sigmoid", macs=0),) + head[at:]
    diff = diff_runs(run(layers=base), run(layers=head))
    assert [c.status for c in diff.layers].count("added") == edits
    return _lines_run(lambda: diff_runs(run(layers=base), run(layers=head)))


def test_matching_a_renumbered_graph_is_linear_in_its_size() -> None:
    # Doubling the graph must about double the work (a longest-block search, as difflib
    # does, compares each layer with every layer of the same signature: 4x).
    for edits in (1, 3):
        small, large = _diff_lines(600, edits), _diff_lines(1200, edits)
        assert large / small < 2.3, (edits, small, large)


def test_renumbered_graph_with_one_insertion_pairs_everything_else() -> None:
    size = 3000
    base, head = _renumbered_chain(size, insert_at=size // 2)
    diff = diff_runs(run(layers=base), run(layers=head))
    assert [c.status for c in diff.layers].count("added") == 1
    assert [c.status for c in diff.layers].count("unchanged") == size


def test_layer_lookup_goes_through_the_name_index() -> None:
    size = 2000
    record = run(layers=tuple(layer(_Counted(f"layer{i}")) for i in range(size)))
    names = [x.name for x in record.layers]
    _Counted.calls = 0
    found = [record.layer(name) for name in names]
    # A scan per lookup would compare about size^2 / 2 = 2,000,000 names.
    assert _Counted.calls <= 2 * size
    assert [x.name for x in found if x is not None] == names
    assert record.layer("absent") is None
    assert record.layer_index()["layer7"] is record.layers[7]


def test_layer_lookup_returns_the_first_of_duplicated_names() -> None:
    first, second = layer("dup", macs=1), layer("dup", macs=2)
    assert run(layers=(first, second)).layer("dup") is first


def test_equal_metrics_with_an_unknown_value_still_show_it() -> None:
    # The shortcut for identical metrics must not hide an unknown (None) figure: unknown
    # equals nothing, so it shows as '?' on both sides.
    unknown = layer("x", arithmetic_intensity=None)
    diff = diff_runs(run(layers=(unknown,)), run(layers=(unknown,)))
    assert diff.layers[0].deltas == {"arithmetic_intensity": (None, None)}
    same = layer("y")
    assert diff_runs(run(layers=(same,)), run(layers=(same,))).layers[0].deltas == {}
