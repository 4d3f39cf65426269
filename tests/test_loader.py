"""The ONNX loader: shapes against onnx shape inference and onnx.reference, and hostile inputs."""

from __future__ import annotations

import os
import sys
from pathlib import Path

import numpy as np
import onnx
import pytest
from loadkit import chain, deeply_nested_if, loop_model, model, save, small_cnn, vi, weight
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

import gate.model.loader as loader_module
from gate.errors import InputError
from gate.model.loader import load_model


def _shapes_by_name(loaded) -> dict[str, tuple]:
    return {t.name: t.shape for n in loaded.graph.nodes for t in n.outputs}


# ------------------------------------------------------------------ cross-checks with onnx


def test_every_output_shape_matches_onnx_shape_inference(tmp_path: Path) -> None:
    # Source: onnx.shape_inference (with data propagation) run independently on the same model.
    proto = small_cnn(batch=2)
    loaded = load_model(save(proto, tmp_path / "m.onnx"))
    inferred = onnx.shape_inference.infer_shapes(proto, data_prop=True)
    expected = {v.name: tuple(d.dim_value for d in v.type.tensor_type.shape.dim)
                for v in (*inferred.graph.value_info, *inferred.graph.output)}
    got = _shapes_by_name(loaded)
    assert got["flat"] == (2, 128)  # needs data propagation through Shape/Gather/Concat
    for name, shape in got.items():
        assert shape == expected[name], name


def test_every_output_shape_matches_reference_evaluator(tmp_path: Path) -> None:
    # Source: onnx.reference.ReferenceEvaluator actually runs the model; every node output is
    # exposed as a graph output so its real array shape can be compared with the loader's.
    proto = small_cnn(batch=3)
    names = [out for node in proto.graph.node for out in node.output]
    proto.graph.output.extend(onnx.ValueInfoProto(name=n) for n in names if n != "y")
    loaded = load_model(save(proto, tmp_path / "m.onnx"))
    run = ReferenceEvaluator(proto).run(None, {"x": np.ones((3, 3, 8, 8), np.float32)})
    actual = dict(zip([o.name for o in proto.graph.output], run))
    got = _shapes_by_name(loaded)
    for name in names:
        assert got[name] == tuple(np.asarray(actual[name]).shape), name


def test_model_facts_and_params(tmp_path: Path) -> None:
    loaded = load_model(save(small_cnn(), tmp_path / "m.onnx"))
    assert loaded.name == "small_cnn" and loaded.opsets == {"": 17}
    conv = loaded.graph.nodes[0]
    assert conv.param_inputs == {1, 2} and conv.attributes["pads"] == [1, 1, 1, 1]
    gather = next(n for n in loaded.graph.nodes if n.op_type == "Gather")
    assert gather.const_values == {1: (0,)}  # small inline int initializer read; weights never
    assert 1 not in conv.const_values


def test_dims_bound_before_inference(tmp_path: Path) -> None:
    path = save(small_cnn(batch="batch"), tmp_path / "m.onnx")
    assert load_model(path).unbound_dims == ("batch",)
    bound = load_model(path, {"batch": 5})
    assert bound.unbound_dims == () and bound.dim_bindings == {"batch": 5}
    assert _shapes_by_name(bound)["y"] == (5, 10)


def test_unused_dim_binding_warns(tmp_path: Path) -> None:
    loaded = load_model(save(small_cnn(), tmp_path / "m.onnx"), {"seq": 4})
    assert any("dim binding seq=4 (--dim or dims:)" in w and "did you mean" not in w
               for w in loaded.warnings)
    assert loaded.unused_bindings == ("seq",)


def test_a_misspelled_dim_binding_is_named_beside_the_dim_it_left_unbound(
        tmp_path: Path) -> None:
    """``dims: {btach: 1}`` for a model whose dim is 'batch': the model stays unsized (its
    layers unmodelled, the gate fails on it), and both notes point at the typo."""
    from gate.profile import profile_model

    loaded = load_model(save(small_cnn(batch="batch"), tmp_path / "m.onnx"), {"btach": 1})
    assert loaded.unbound_dims == ("batch",) and loaded.unused_bindings == ("btach",)
    assert any("no symbolic dim 'btach' (binding ignored; did you mean 'batch'?)" in w
               for w in loaded.warnings)
    notes = profile_model(loaded).notes
    assert any(n.startswith("symbolic dim 'batch' unbound: bind it with --dim batch=N")
               and "the binding 'btach' names no dim of this model: a typo for 'batch'?" in n
               for n in notes), notes


def test_negative_dim_binding_refused(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="--dim batch=N"):
        load_model(save(small_cnn(batch="batch"), tmp_path / "m.onnx"), {"batch": -1})


def test_local_functions_are_inlined(tmp_path: Path) -> None:
    fn = helper.make_function("local.fn", "DoubleRelu", ["a"], ["b"],
                              [helper.make_node("Relu", ["a"], ["t"]),
                               helper.make_node("Relu", ["t"], ["b"])],
                              [helper.make_opsetid("", 17)])
    proto = model([helper.make_node("DoubleRelu", ["x"], ["y"], domain="local.fn")],
                  [vi("x", [2, 3])], [vi("y", None)],
                  extra_opsets=[helper.make_opsetid("local.fn", 1)], functions=[fn])
    loaded = load_model(save(proto, tmp_path / "m.onnx"))
    assert [n.op_type for n in loaded.graph.nodes] == ["Relu", "Relu"]
    assert loaded.graph.nodes[-1].outputs[0].shape == (2, 3)


def test_constant_node_float_weights_are_params(tmp_path: Path) -> None:
    value = numpy_helper.from_array(np.zeros((4, 4), np.float32))
    nodes = [helper.make_node("Constant", [], ["w"], value=value),
             helper.make_node("Constant", [], ["axes"], value_ints=[0]),
             helper.make_node("MatMul", ["x", "w"], ["y"]),
             helper.make_node("Unsqueeze", ["y", "axes"], ["z"])]
    loaded = load_model(save(model(nodes, [vi("x", [2, 4])], [vi("z", None)]), tmp_path / "m.onnx"))
    matmul, unsqueeze = loaded.graph.nodes[2], loaded.graph.nodes[3]
    assert matmul.param_inputs == {1}
    assert unsqueeze.param_inputs == frozenset() and unsqueeze.const_values == {1: (0,)}


def test_loop_subgraph_and_trip_count(tmp_path: Path) -> None:
    loaded = load_model(save(loop_model(trip=7), tmp_path / "m.onnx"))
    loop = loaded.graph.nodes[0]
    assert loop.const_values[0] == (7,) and loop.const_values[1] == (1,)
    body = loop.subgraphs["body"]
    matmul = body.nodes[0]
    assert matmul.outputs[0].shape == (1, 4) and matmul.param_inputs == {1}  # outer-scope weight


def test_unsorted_acyclic_graph_is_sorted(tmp_path: Path) -> None:
    nodes = [helper.make_node("Relu", ["a"], ["b"], name="second"),
             helper.make_node("Relu", ["x"], ["a"], name="first")]
    loaded = load_model(save(model(nodes, [vi("x", [2])], [vi("b", [2])]), tmp_path / "m.onnx"))
    assert [n.name for n in loaded.graph.nodes] == ["first", "second"]
    assert [n.index for n in loaded.graph.nodes] == [0, 1]


def test_unnamed_and_duplicate_node_names_are_made_unique(tmp_path: Path) -> None:
    nodes = [helper.make_node("Relu", ["x"], ["a"]), helper.make_node("Relu", ["a"], ["b"], name="r"),
             helper.make_node("Relu", ["b"], ["c"], name="r")]
    loaded = load_model(save(model(nodes, [vi("x", [2])], [vi("c", [2])]), tmp_path / "m.onnx"))
    assert [n.name for n in loaded.graph.nodes] == ["Relu_0", "r", "r~2"]


# ------------------------------------------------------------------ external data


def _external_model(tmp_path: Path, location: str | None = None) -> Path:
    proto = model([helper.make_node("MatMul", ["x", "w"], ["y"])], [vi("x", [1, 64])],
                  [vi("y", None)], [numpy_helper.from_array(np.ones((64, 32), np.float32), "w")])
    path = tmp_path / "ext.onnx"
    onnx.save_model(proto, str(path), save_as_external_data=True, location="ext.bin",
                    size_threshold=0)
    if location is not None:  # rewrite the location to point elsewhere
        saved = onnx.load(str(path), load_external_data=False)
        for entry in saved.graph.initializer[0].external_data:
            if entry.key == "location":
                entry.value = location
        onnx.save(saved, str(path))
    return path


def test_external_data_is_never_opened(tmp_path: Path) -> None:
    path = _external_model(tmp_path)
    data = tmp_path / "ext.bin"
    data.unlink()  # the weights are gone: loading must not need them
    opened: list[str] = []

    def hook(event: str, args: tuple) -> None:
        if event == "open" and isinstance(args[0], (str, bytes, os.PathLike)):
            opened.append(os.fsdecode(args[0]))

    sys.addaudithook(hook)  # audit hooks cannot be removed; this one only records
    loaded = load_model(path)
    assert not any(p.endswith("ext.bin") for p in opened)
    matmul = loaded.graph.nodes[0]
    assert matmul.inputs[1].shape == (64, 32) and matmul.inputs[1].nbytes == 64 * 32 * 4
    assert matmul.outputs[0].shape == (1, 32)


@pytest.mark.parametrize("location", ["../outside.bin", "/etc/passwd", "sub/../../x.bin"])
def test_external_data_outside_folder_warns(tmp_path: Path, location: str) -> None:
    folder = tmp_path / "models"
    folder.mkdir()
    loaded = load_model(_external_model(folder, location))
    assert any("outside the model's folder" in w and location in w for w in loaded.warnings)


def test_external_data_inside_folder_no_warning(tmp_path: Path) -> None:
    assert load_model(_external_model(tmp_path)).warnings == ()


# ------------------------------------------------------------------ the over-2-GB path


def test_path_based_inference_never_overwrites_input(tmp_path: Path, monkeypatch) -> None:
    path = save(small_cnn(batch=2), tmp_path / "m.onnx")
    before = path.read_bytes()
    in_memory = load_model(path)
    calls: list[tuple[str, str]] = []
    real = onnx.shape_inference.infer_shapes_path

    def spy(src, dst, **kwargs):
        calls.append((str(src), str(dst)))
        return real(src, dst, **kwargs)

    monkeypatch.setattr(loader_module, "PATH_INFERENCE_BYTES", 1)
    monkeypatch.setattr(onnx.shape_inference, "infer_shapes_path", spy)
    by_path = load_model(path)
    assert calls and str(path) not in calls[0]  # a weightless copy, in a temporary folder
    assert path.read_bytes() == before  # the input file is untouched
    assert by_path.graph == in_memory.graph


def test_path_based_inference_with_absent_external_data(tmp_path: Path, monkeypatch) -> None:
    path = _external_model(tmp_path)
    (tmp_path / "ext.bin").unlink()
    monkeypatch.setattr(loader_module, "PATH_INFERENCE_BYTES", 1)
    loaded = load_model(path)
    assert loaded.graph.nodes[0].outputs[0].shape == (1, 32) and loaded.warnings == ()


# ------------------------------------------------------------------ hostile inputs


def _error(path: Path, **kwargs) -> str:
    with pytest.raises(InputError) as info:
        load_model(path, **kwargs)
    text = info.value.format_message()
    assert "\n" not in text and str(path) in text
    return text


def test_empty_file(tmp_path: Path) -> None:
    path = tmp_path / "empty.onnx"
    path.write_bytes(b"")
    assert "empty" in _error(path)


def test_missing_file_and_directory(tmp_path: Path) -> None:
    assert "not found" in _error(tmp_path / "nope.onnx")
    assert "directory" in _error(tmp_path)


def test_lfs_pointer(tmp_path: Path) -> None:
    path = tmp_path / "lfs.onnx"
    path.write_text("version https://git-lfs.github.com/spec/v1\noid sha256:" + "0" * 64 +
                    "\nsize 123456\n")
    assert "git lfs pull" in _error(path)


def test_truncated_at_every_offset(tmp_path: Path) -> None:
    # A model whose last field is its one opset import: any cut loses something we check.
    data = small_cnn().SerializeToString()
    path = tmp_path / "cut.onnx"
    for offset in range(1, len(data), 7):
        path.write_bytes(data[:offset])
        _error(path)


@pytest.mark.parametrize("seed", range(8))
def test_random_bytes(tmp_path: Path, seed: int) -> None:
    path = tmp_path / "noise.onnx"
    path.write_bytes(np.random.default_rng(seed).bytes(4096))
    _error(path)


def test_protobuf_that_is_not_a_model(tmp_path: Path) -> None:
    path = tmp_path / "tensor.onnx"
    path.write_bytes(numpy_helper.from_array(np.arange(100, dtype=np.int64), "t").SerializeToString())
    _error(path)
    path.write_bytes(helper.make_node("Relu", ["a"], ["b"]).SerializeToString())
    _error(path)


def test_model_without_graph(tmp_path: Path) -> None:
    proto = onnx.ModelProto(ir_version=8, opset_import=[helper.make_opsetid("", 17)])
    path = tmp_path / "nograph.onnx"
    path.write_bytes(proto.SerializeToString())
    assert "no graph" in _error(path)


def test_opset_newer_than_installed_onnx(tmp_path: Path) -> None:
    newest = onnx.defs.onnx_opset_version()
    proto = chain(1)
    proto.opset_import[0].version = newest + 5
    text = _error(save(proto, tmp_path / "future.onnx"))
    assert f"opset {newest + 5}" in text and "upgrade onnx" in text


def test_ir_version_newer_than_installed_onnx(tmp_path: Path) -> None:
    proto = chain(1)
    proto.ir_version = onnx.IR_VERSION + 1
    assert "upgrade onnx" in _error(save(proto, tmp_path / "future.onnx"))


def test_cycle_names_a_node(tmp_path: Path) -> None:
    nodes = [helper.make_node("Add", ["x", "b"], ["a"], name="first"),
             helper.make_node("Relu", ["a"], ["b"], name="second")]
    text = _error(save(model(nodes, [vi("x", [2])], [vi("b", [2])]), tmp_path / "cyc.onnx"))
    assert "cycle" in text and ("'first'" in text or "'second'" in text)


def test_dangling_edge_names_the_node(tmp_path: Path) -> None:
    nodes = [helper.make_node("Add", ["x", "ghost"], ["y"], name="adder")]
    text = _error(save(model(nodes, [vi("x", [2])], [vi("y", [2])]), tmp_path / "dang.onnx"))
    assert "'adder'" in text and "'ghost'" in text


def test_dangling_edge_inside_subgraph(tmp_path: Path) -> None:
    body = helper.make_graph([helper.make_node("Relu", ["ghost"], ["o"], name="inner")], "b", [],
                             [vi("o", [2])])
    nodes = [helper.make_node("If", ["c"], ["y"], then_branch=body, else_branch=body)]
    proto = model(nodes, [vi("c", [], TensorProto.BOOL)], [vi("y", [2])])
    assert "'inner'" in _error(save(proto, tmp_path / "dang.onnx"))


def test_tensor_produced_twice(tmp_path: Path) -> None:
    nodes = [helper.make_node("Relu", ["x"], ["y"], name="a"),
             helper.make_node("Relu", ["x"], ["y"], name="b")]
    assert "produced by both" in _error(save(model(nodes, [vi("x", [2])], [vi("y", [2])]),
                                             tmp_path / "twice.onnx"))


def test_deep_nesting_within_protobuf_limit_loads(tmp_path: Path) -> None:
    path = tmp_path / "deep.onnx"
    path.write_bytes(deeply_nested_if(30))
    loaded = load_model(path)
    depth, graph = 0, loaded.graph
    while graph.nodes and graph.nodes[0].subgraphs:
        graph, depth = graph.nodes[0].subgraphs["then_branch"], depth + 1
    assert depth == 30


def test_deep_nesting_beyond_protobuf_limit_is_input_error(tmp_path: Path) -> None:
    path = tmp_path / "deeper.onnx"
    path.write_bytes(deeply_nested_if(500))
    assert "nested too deeply" in _error(path)


def test_zero_negative_and_huge_dims(tmp_path: Path) -> None:
    huge = 2**62
    proto = model([helper.make_node("Relu", ["x"], ["y"]), helper.make_node("Relu", ["z"], ["w"])],
                  [vi("x", [0, huge, 3]), vi("z", [2, 2])], [vi("y", None), vi("w", None)])
    loaded = load_model(save(proto, tmp_path / "dims.onnx"))
    x, _ = loaded.graph.inputs
    # an input's size-0 axis is a dynamic axis exported as 0: unknown, with a note
    assert x.shape == ("?", huge, 3) and x.numel is None
    assert any("input 'x' declares size 0 on axis 0" in w for w in loaded.warnings)
    sized = load_model(tmp_path / "dims.onnx", shapes={"x": (2, huge, 3)})
    y = sized.graph.nodes[0].outputs[0]
    assert y.shape == (2, huge, 3) and isinstance(y.shape[1], int)  # exact, no overflow
    assert y.numel == 2 * huge * 3


def test_negative_dims_are_refused_naming_the_tensor(tmp_path: Path) -> None:
    """ONNX dims are non-negative; an unknown size is a dim_param (ONNX IR spec, TensorShapeProto)."""
    proto = model([helper.make_node("MatMul", ["x", "w"], ["y"])], [vi("x", [1, 4])],
                  [vi("y", None)], [weight("w", [4, 4])])
    proto.graph.input[0].type.tensor_type.shape.dim[0].dim_value = -4
    assert "tensor 'x' declares a negative dim [-4, 4]" in _error(save(proto, tmp_path / "a.onnx"))
    proto.graph.input[0].type.tensor_type.shape.dim[0].dim_value = 1
    proto.graph.initializer[0].dims[0] = -4
    assert "weight 'w' has a negative dim [-4, 4]" in _error(save(proto, tmp_path / "b.onnx"))
    proto.graph.initializer[0].dims[:] = [2**62, 4]
    assert "more elements than an ONNX tensor can hold" in _error(save(proto, tmp_path / "c.onnx"))


def test_duplicate_initializer_names(tmp_path: Path) -> None:
    inits = [weight("w", [4, 4]) for _ in range(2000)]
    proto = model([helper.make_node("MatMul", ["x", "w"], ["y"])], [vi("x", [1, 4])],
                  [vi("y", None)], inits)
    loaded = load_model(save(proto, tmp_path / "dup.onnx"))
    assert list(loaded.graph.initializers) == ["w"]
    assert any("2000 initializers share the name 'w'" in w for w in loaded.warnings)
    proto.graph.initializer[5].CopyFrom(weight("w", [4, 5]))
    assert "two initializers named 'w'" in _error(save(proto, tmp_path / "dup2.onnx"))


def test_custom_domain_op_loads(tmp_path: Path) -> None:
    proto = model([helper.make_node("Frobnicate", ["x"], ["y"], domain="vendor.x")],
                  [vi("x", [2])], [vi("y", None)],
                  extra_opsets=[helper.make_opsetid("vendor.x", 1)])
    node = load_model(save(proto, tmp_path / "custom.onnx")).graph.nodes[0]
    assert node.domain == "vendor.x" and node.outputs[0].shape is None


def test_long_chain_loads_with_every_node_shaped(tmp_path: Path) -> None:
    loaded = load_model(save(chain(5000), tmp_path / "long.onnx"))
    assert len(loaded.graph.nodes) == 5000
    assert loaded.graph.nodes[-1].outputs[0].shape == (1, 16)


def test_names_that_are_not_utf8_load_with_visible_escapes(tmp_path: Path) -> None:
    # ONNX string fields are proto2 strings: protobuf's Python runtime returns invalid UTF-8
    # as bytes (found by the fuzz run). Names must reach reports as text, linkage intact.
    nodes = [helper.make_node("Relu", ["x"], ["NAMEX"], name="NAMEY"),
             helper.make_node("Relu", ["NAMEX"], ["y"], name="second")]
    raw = model(nodes, [vi("x", [1, 4])], [vi("y", [1, 4])]).SerializeToString()
    assert raw.count(b"NAMEX") == 2 and raw.count(b"NAMEY") == 1
    path = tmp_path / "bad_utf8.onnx"
    path.write_bytes(raw.replace(b"NAMEX", b"\xe3AMEX").replace(b"NAMEY", b"\xffAMEY"))
    loaded = load_model(path)
    first, second = loaded.graph.nodes
    assert first.name == "\\xffAMEY" and first.outputs[0].name == "\\xe3AMEX"
    assert second.inputs[0].name == "\\xe3AMEX" and second.outputs[0].shape == (1, 4)
    assert any("not valid UTF-8" in w for w in loaded.warnings)


def test_the_parsed_proto_is_walked_once_before_inference(tmp_path: Path,
                                                          monkeypatch: pytest.MonkeyPatch) -> None:
    """Refusing impossible dims, warning about external data, collecting symbolic dims and
    dropping weight values share one walk of the graphs (each walk of a large proto costs
    tenths of a second); counted, not timed."""
    walks = []
    real = loader_module.all_graph_protos

    def counting(graph: onnx.GraphProto):
        walks.append(graph.name)
        return real(graph)

    monkeypatch.setattr(loader_module, "all_graph_protos", counting)
    loaded = load_model(save(loop_model(3), tmp_path / "loop.onnx"), {"batch": 1})
    assert walks == [loop_model(3).graph.name]
    assert loaded.graph.nodes  # the walk still reached every scope the loader needs
