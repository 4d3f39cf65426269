"""Per-layer diffs: matching by name, then by signature, then by op type."""

from __future__ import annotations

from dataclasses import replace

from hypothesis import given, settings
from hypothesis import strategies as st

from gate.diff import diff_runs, match_layers, ranked_changes, same_value
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
