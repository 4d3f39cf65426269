"""A small fluent builder of ONNX graphs on top of ``onnx.helper``; no downloads.

Tests, the demo and the benchmarks need real ONNX models of known architecture
without fetching anything. ``GraphBuilder`` writes them layer by layer: each
layer method takes input tensor names and returns the output tensor name, so a
network reads top to bottom like its paper's table. The builder tracks every
tensor's shape itself (ints, or a ``str`` for a symbolic dim such as ``batch``)
so parameter shapes follow from the input, and ``build()`` checks the result
with ``onnx.checker`` and strict ``onnx.shape_inference``.

Weights come in three modes, chosen per build:

- ``"external"``: each initializer is an external-data reference (location,
  offset, length) into a file that is *never written*. Models stay a few KB
  whatever their size, and profiling one proves no weight is ever opened.
- ``"inline"``: real zero-filled bytes (a ResNet-50 is ~100 MB), for
  benchmarks of loading large files.
- ``"random"``: small seeded random values (BN variances and scales are ones),
  so ``onnx.reference`` can run the graph and give non-trivial outputs.
"""

from __future__ import annotations

import tempfile
from collections.abc import Sequence
from pathlib import Path
from typing import Any, Literal

import numpy as np
import onnx
from onnx import TensorProto, helper

Dim = int | str | None  # None: a dim nobody can know statically
Shape = tuple[Dim, ...]
WeightsMode = Literal["external", "inline", "random"]
WEIGHTS_MODES: tuple[str, ...] = ("external", "inline", "random")
DEFAULT_OPSET = 17  # LayerNormalization needs >= 17
PRODUCER = "roofgate.synth"


class GraphBuilder:
    """Builds one ONNX graph node by node; layer helpers live in ``gate.synth.layers``.

    ``fold_bn`` is read by the conv helpers: when true a Conv carries a bias and
    no BatchNormalization node follows it (as after BN folding); when false
    Conv, BatchNormalization and the activation are separate nodes, as in a
    training export.
    """

    def __init__(
        self,
        name: str,
        *,
        weights: WeightsMode = "external",
        opset: int = DEFAULT_OPSET,
        dtype: int = TensorProto.FLOAT,
        fold_bn: bool = False,
        external_location: str | None = None,
        seed: int = 0,
    ) -> None:
        if weights not in WEIGHTS_MODES:
            raise ValueError(f"weights must be one of {WEIGHTS_MODES}, not {weights!r}")
        self.name = name
        self.weights = weights
        self.opset = opset
        self.dtype = dtype
        self.fold_bn = fold_bn
        self.external_location = external_location or f"{name}.weights.bin"
        self._rng = np.random.default_rng(seed)
        self._nodes: list[onnx.NodeProto] = []
        self._inits: list[TensorProto] = []
        self._inputs: list[onnx.ValueInfoProto] = []
        self._outputs: list[onnx.ValueInfoProto] = []
        self._shapes: dict[str, Shape] = {}
        self._dtypes: dict[str, int] = {}
        self._node_names: set[str] = set()
        self._external_offset = 0

    # -- tensors ---------------------------------------------------------------

    def shape(self, tensor: str) -> Shape:
        """The tracked shape of ``tensor``."""
        return self._shapes[tensor]

    def channels(self, tensor: str) -> int:
        """Dim 1 of an NCHW tensor, which must be a known int."""
        dim = self._shapes[tensor][1]
        if not isinstance(dim, int):
            raise ValueError(f"{tensor}: channel dim is not static ({dim!r})")
        return dim

    def input(self, name: str, shape: Sequence[Dim], dtype: int | None = None) -> str:
        """Declare a graph input; str dims become symbolic ``dim_param``s."""
        elem = self.dtype if dtype is None else dtype
        self._inputs.append(helper.make_tensor_value_info(name, elem, list(shape)))
        self._track(name, tuple(shape), elem)
        return name

    def output(self, tensor: str) -> str:
        """Mark ``tensor`` as a graph output, declared with its tracked shape."""
        dims = list(self._shapes[tensor])
        self._outputs.append(helper.make_tensor_value_info(tensor, self._dtypes[tensor], dims))
        return tensor

    def param(self, name: str, shape: Sequence[int], fill: Literal["zeros", "ones"] = "zeros") -> str:
        """Add a parameter initializer in this builder's weights mode.

        ``fill="ones"`` marks a parameter that must not be zero or random in
        ``"random"`` mode (BN variance/scale); "inline" stays all zeros.
        """
        dims = [int(d) for d in shape]
        count = int(np.prod(dims, dtype=np.int64)) if dims else 1
        itemsize = np.dtype(helper.tensor_dtype_to_np_dtype(self.dtype)).itemsize
        tensor = TensorProto(name=name, data_type=self.dtype, dims=dims)
        if self.weights == "external":
            self._set_external(tensor, count * itemsize)
        elif self.weights == "inline":
            tensor.raw_data = bytes(count * itemsize)
        else:
            tensor.raw_data = self._random_values(dims, fill).tobytes()
        self._inits.append(tensor)
        self._track(name, tuple(dims), self.dtype)
        return name

    def const_ints(self, name: str, values: Sequence[int]) -> str:
        """A small INT64 constant (shape, axes), always stored inline whatever the mode."""
        self._inits.append(helper.make_tensor(name, TensorProto.INT64, [len(values)], list(values)))
        self._track(name, (len(values),), TensorProto.INT64)
        return name

    def const_scalar(self, name: str, value: float) -> str:
        """A scalar constant in the builder's float type, always stored inline."""
        array = np.array(value, dtype=helper.tensor_dtype_to_np_dtype(self.dtype))
        self._inits.append(onnx.numpy_helper.from_array(array, name))
        self._track(name, (), self.dtype)
        return name

    # -- nodes -----------------------------------------------------------------

    def node(
        self,
        op_type: str,
        inputs: Sequence[str],
        out_shapes: Sequence[Shape],
        *,
        name: str,
        out_names: Sequence[str] | None = None,
        out_dtype: int | None = None,
        **attrs: Any,
    ) -> list[str]:
        """Append one node; returns its output names (``<name>.out`` by default).

        ``out_shapes`` is what this node produces; ``build()`` has onnx shape
        inference confirm it for the graph outputs.
        """
        if name in self._node_names:
            raise ValueError(f"duplicate node name {name!r}")
        if out_names is None:
            out_names = [f"{name}.out"] if len(out_shapes) == 1 else [
                f"{name}.out{i}" for i in range(len(out_shapes))]
        self._node_names.add(name)
        self._nodes.append(helper.make_node(op_type, list(inputs), list(out_names), name=name,
                                            **attrs))
        elem = self.dtype if out_dtype is None else out_dtype
        for out, shape in zip(out_names, out_shapes):
            self._track(out, tuple(shape), elem)
        return list(out_names)

    # -- model -----------------------------------------------------------------

    def build(self, *, validate: bool = True) -> onnx.ModelProto:
        """Assemble the ModelProto; with ``validate`` run the checker and strict inference."""
        graph = helper.make_graph(self._nodes, self.name, self._inputs, self._outputs,
                                  self._inits)
        opsets = [helper.make_opsetid("", self.opset)]
        model = helper.make_model(graph, opset_imports=opsets, producer_name=PRODUCER,
                                  ir_version=helper.find_min_ir_version_for(opsets))
        if validate:
            validate_model(model)
        return model

    def _track(self, name: str, shape: Shape, dtype: int) -> None:
        if name in self._shapes:
            raise ValueError(f"tensor {name!r} defined twice")
        self._shapes[name] = shape
        self._dtypes[name] = dtype

    def _set_external(self, tensor: TensorProto, length_bytes: int) -> None:
        tensor.data_location = TensorProto.EXTERNAL
        entries = (("location", self.external_location),
                   ("offset", str(self._external_offset)), ("length", str(length_bytes)))
        for key, value in entries:
            tensor.external_data.add(key=key, value=value)
        self._external_offset += length_bytes

    def _random_values(self, dims: list[int], fill: str) -> np.ndarray:
        np_type = helper.tensor_dtype_to_np_dtype(self.dtype)
        if fill == "ones":
            return np.ones(dims, dtype=np_type)
        return (self._rng.standard_normal(dims) * 0.1).astype(np_type)


def external_locations(model: onnx.ModelProto) -> set[str]:
    """Every external-data file location the model's initializers refer to."""
    found: set[str] = set()
    for tensor in model.graph.initializer:
        if tensor.data_location == TensorProto.EXTERNAL:
            found.update(e.value for e in tensor.external_data if e.key == "location")
    return found


def save_model(model: onnx.ModelProto, path: str | Path) -> Path:
    """Write only the ``.onnx`` file; external weight files are deliberately not written.

    ``onnx.save_model`` is avoided on purpose: it would try to resolve external
    data. The written file loads with ``onnx.load(path, load_external_data=False)``.
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    target.write_bytes(model.SerializeToString())
    return target


def validate_model(model: onnx.ModelProto) -> None:
    """Run ``onnx.checker`` (full) and strict shape inference; raise on any problem.

    The checker insists that external-data files exist, so an external-weights
    model is checked in a temporary folder next to *empty* placeholder files;
    no weight byte is ever written.
    """
    locations = external_locations(model)
    if not locations:
        onnx.checker.check_model(model, full_check=True)
    else:
        with tempfile.TemporaryDirectory(prefix="roofgate-synth-") as folder:
            for location in locations:
                placeholder = Path(folder, location)
                placeholder.parent.mkdir(parents=True, exist_ok=True)
                placeholder.touch()
            onnx.checker.check_model(str(save_model(model, Path(folder, "model.onnx"))),
                                     full_check=True)
    onnx.shape_inference.infer_shapes(model, strict_mode=True, check_type=True)
