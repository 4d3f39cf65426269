"""Per-layer fast paths give what the plain computation gives.

Each test states the plain computation the fast path replaced (a sort, a second pass
over a layer's tensors) and checks the fast path against it on real layers, including
the cases the fast path must not miss (an unsized tensor, a tensor read twice).
"""

from __future__ import annotations

from dataclasses import replace

import pytest
from onnx import TensorProto, helper

from gate.costmodel import cost_model
from gate.model.loader import load_model
from gate.profile import profile_model
from gate.records import layer_to_dict, sorted_metrics
from gate.summarize import LayerMetrics
from gate.targets import load_target
from tests.loadkit import model, save, vi, weight


def test_sorted_metrics_are_the_sorted_dict_key_for_key(small_cnn_analysed) -> None:  # type: ignore[no-untyped-def]
    profile, cost, run = small_cnn_analysed
    for layer, layer_cost, record in zip(profile.layers, cost.layers, run.layers):
        for view in (record.metrics, LayerMetrics(layer, replace(layer_cost, energy=None))):
            plain = dict(sorted(view.as_dict().items()))
            assert list(sorted_metrics(view).items()) == list(plain.items())  # order too
    record = run.layers[0]
    assert list(layer_to_dict(record)["metrics"]) == sorted(record.metrics)
    plain_dict = {"b": 1, "a": 2.0}  # a record read back from JSON holds a plain dict
    assert list(sorted_metrics(plain_dict).items()) == [("a", 2.0), ("b", 1)]


def test_a_tensor_read_twice_is_counted_once(tmp_path) -> None:  # type: ignore[no-untyped-def]
    proto = model([helper.make_node("Add", ["x", "x"], ["y"], name="add")],
                  [vi("x", [1, 16])], [vi("y", [1, 16])])
    layer = profile_model(load_model(save(proto, tmp_path / "m.onnx"))).layers[0]
    assert layer.input_bytes == 16 * 4 and layer.output_bytes == 16 * 4  # fp32: 4 bytes each


@pytest.mark.parametrize("shape, reason", [
    (["n", 16], "symbolic dim 'n' unbound: bind it with --dim n=N"),
    (None, "shape of tensor 'x' was not inferred"),
])
def test_an_unsized_tensor_still_names_its_problem(tmp_path, shape, reason) -> None:  # type: ignore[no-untyped-def]
    proto = model([helper.make_node("Relu", ["x"], ["y"], name="relu")],
                  [vi("x", shape)], [vi("y", shape)])
    profile = profile_model(load_model(save(proto, tmp_path / "m.onnx")))
    layer = profile.layers[0]
    assert not layer.modelled and layer.unmodelled_reason == reason
    assert layer.input_bytes is None and layer.output_bytes is None
    if shape is not None:
        assert any("symbolic dim 'n' unbound" in note for note in profile.notes)


def test_an_unused_unsized_output_does_not_unmodel_the_layer(tmp_path) -> None:  # type: ignore[no-untyped-def]
    # Dropout's mask (output 1) is read by nothing: its size does not matter.
    proto = model([helper.make_node("Dropout", ["x"], ["y", "mask"], name="drop")],
                  [vi("x", [1, 16])], [vi("y", [1, 16])])
    proto.graph.value_info.append(vi("mask", None, TensorProto.BOOL))
    layer = profile_model(load_model(save(proto, tmp_path / "m.onnx"))).layers[0]
    assert layer.modelled and layer.output_bytes == 16 * 4


def test_profile_rows_are_built_in_the_order_the_writer_sorts_them(small_cnn_analysed) -> None:  # type: ignore[no-untyped-def]
    from gate.report.profile_text import _layer_dicts

    def keys_sorted(value: object) -> bool:
        if isinstance(value, dict):
            return list(value) == sorted(value) and all(map(keys_sorted, value.values()))
        if isinstance(value, list):
            return all(map(keys_sorted, value))
        return True

    profile, _cost, _run = small_cnn_analysed
    rows = list(_layer_dicts(profile))
    assert rows and all(keys_sorted(row) for row in rows)


def test_fused_groups_alike_but_for_their_ops_keep_their_own_ops(tmp_path) -> None:  # type: ignore[no-untyped-def]
    # Conv+LeakyRelu and Conv+Clip: same shapes, weights of the same size, and 2 epilogue
    # ops per element each (ONNX spec formulas): every figure of the two groups' costing
    # is alike, only the absorbed op types differ, and the remembered costs must keep them.
    nodes = [helper.make_node("Conv", ["x", "w1"], ["c1"], name="conv1"),
             helper.make_node("LeakyRelu", ["c1"], ["a1"], name="act1"),
             helper.make_node("Conv", ["a1", "w2"], ["c2"], name="conv2"),
             helper.make_node("Clip", ["c2"], ["y"], name="act2")]
    proto = model(nodes, [vi("x", [1, 8, 4, 4])], [vi("y", [1, 8, 4, 4])],
                  [weight("w1", [8, 8, 1, 1]), weight("w2", [8, 8, 1, 1])])
    profile = profile_model(load_model(save(proto, tmp_path / "m.onnx")))
    cost = cost_model(profile, load_target("ws-64x64-4mib"))
    heads = {c.name: c for c in cost.layers if c.fused_ops}
    assert heads["conv1"].fused_ops == ("LeakyRelu",) and heads["conv2"].fused_ops == ("Clip",)
    assert heads["conv1"].latency_s == heads["conv2"].latency_s  # alike otherwise
    assert heads["conv2"].index == 2 and cost.layers[3].fused_into == "conv2"


class _Forgetful(dict):  # type: ignore[type-arg]
    """An ``array_costs`` that remembers nothing: every layer and group costed afresh."""

    def get(self, key, default=None):  # type: ignore[no-untyped-def]
        return default


def _costed_afresh(profile, target, **options):  # type: ignore[no-untyped-def]
    """``cost_model`` with nothing remembered between layers."""
    import gate.costmodel

    context = gate.costmodel._Context
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(gate.costmodel, "_Context",
                      lambda *args: context(*args, array_costs=_Forgetful()))
        return cost_model(profile, target, **options)


@pytest.fixture(scope="module")
def networks(tmp_path_factory):  # type: ignore[no-untyped-def]
    from gate.synth import archs
    from gate.synth.forms import quantize

    folder = tmp_path_factory.mktemp("nets")
    built = {"resnet18": archs.resnet18(batch=1, resolution=64),
             "resnet18-qdq": quantize(archs.resnet18(batch=1, resolution=64), "qdq"),
             "mobilenet": archs.mobilenet_v1(0.25, 64, batch=1)}
    return {name: load_model(save(proto, folder / f"{name}.onnx")) for name, proto in built.items()}


@pytest.mark.parametrize("target", ["ws-64x64-4mib", "os-16x16-512kib"])
@pytest.mark.parametrize("precision", [None, "int8"])
def test_remembered_costs_are_the_costs_computed_afresh(networks, target,  # type: ignore[no-untyped-def]
                                                       precision) -> None:
    loaded_target = load_target(target)
    for loaded in networks.values():
        profile = profile_model(loaded, precision)
        afresh = _costed_afresh(profile, loaded_target)
        assert cost_model(profile, loaded_target) == afresh
        assert any(cost.fused_ops for cost in afresh.layers)  # groups were costed


def test_groups_alike_but_for_their_folded_parameters_keep_their_own_traffic(tmp_path) -> None:  # type: ignore[no-untyped-def]
    # conv1 absorbs a per-channel Mul (8 scales), conv2 a per-pixel one (16): alike heads, alike
    # op types, no epilogue; only the group's parameter figures differ. Weights not resident,
    # so each group fetches its parameters: 8x8 fp32 weights (256 B) plus the folded scales,
    # which fold into the conv's bias at the conv's 4 bytes per parameter (gate.costmodel).
    nodes = [helper.make_node("Conv", ["x", "w1"], ["c1"], name="conv1"),
             helper.make_node("Mul", ["c1", "s8"], ["m1"], name="scale1"),
             helper.make_node("Conv", ["m1", "w2"], ["c2"], name="conv2"),
             helper.make_node("Mul", ["c2", "s16"], ["y"], name="scale2")]
    proto = model(nodes, [vi("x", [1, 8, 4, 4])], [vi("y", [1, 8, 4, 4])],
                  [weight("w1", [8, 8, 1, 1]), weight("w2", [8, 8, 1, 1]),
                   weight("s8", [1, 8, 1, 1]), weight("s16", [1, 1, 4, 4])])
    profile = profile_model(load_model(save(proto, tmp_path / "m.onnx")))
    target = load_target("ws-64x64-4mib")
    cost = cost_model(profile, target, weights_resident=False)
    heads = {c.name: c for c in cost.layers if c.fused_ops}
    assert heads["conv1"].param_dram_bytes == 256 + 8 * 4
    assert heads["conv2"].param_dram_bytes == 256 + 16 * 4
    assert cost == _costed_afresh(profile, target, weights_resident=False)
