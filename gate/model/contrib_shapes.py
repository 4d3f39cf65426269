"""Output shapes of the contrib ops we cost, taught to ``onnx.shape_inference``: the mechanism.

onnx knows nothing of the ``com.microsoft`` operators graph optimizers emit, so
its shape inference leaves their outputs (and everything downstream) unsized.
``register_contrib_schemas`` registers, once per process, a permissive schema
for each contrib op we model (any inputs, outputs and attributes) whose type
and shape inference function is its rule in ``gate.model.contrib_rules``; onnx
then propagates the shapes through the rest of the graph as usual. A rule that cannot size an output
leaves it unsized (the layer is then reported as unmodelled); it never raises,
since an exception would abort inference for the whole model.

Rules that are a standard op's shape (FusedConv is Conv, QLinearAveragePool is
AveragePool, ...) run that op's own onnx inference. Input orders and output
shapes of the contrib ops follow the public contrib-op documentation of the
runtime that defines them (ContribOperators.md), several recalled from memory
and marked so.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import onnx
from onnx import TensorProto, TypeProto, helper
from onnx.defs import OpSchema

Dims = list[int | str | None]  # None: a dim of unknown size
Rule = Callable[["Facts"], "list[TypeProto | None]"]

MS_DOMAIN = "com.microsoft"


class Facts:
    """What an inference rule may read of a node: input types and attributes."""

    def __init__(self, inputs: list[TypeProto | None],
                 attribute: Callable[[str], onnx.AttributeProto | None],
                 output_count: int) -> None:
        self.inputs = inputs
        self._attribute = attribute
        self.output_count = output_count

    @classmethod
    def of(cls, ctx: Any) -> Facts:
        """The facts of the node an onnx ``InferenceContext`` describes."""
        inputs = [ctx.get_input_type(i) if ctx.has_input(i) else None
                  for i in range(ctx.get_num_inputs())]
        return cls(inputs, ctx.get_attribute, ctx.get_num_outputs())

    def with_input(self, position: int, value: TypeProto, hidden_attr: str = "") -> Facts:
        """These facts with input ``position`` replaced (and one attribute hidden)."""
        inputs = list(self.inputs)
        inputs[position] = value
        return Facts(inputs, lambda name: None if name == hidden_attr else self._attribute(name),
                     self.output_count)

    def attr_proto(self, name: str) -> onnx.AttributeProto | None:
        return self._attribute(name)

    def attr(self, name: str, default: Any = None) -> Any:
        proto = self._attribute(name)
        return default if proto is None else helper.get_attribute_value(proto)

    def tensor(self, position: int) -> TypeProto | None:
        value = self.inputs[position] if position < len(self.inputs) else None
        return value if value is not None and value.HasField("tensor_type") else None

    def dims(self, position: int) -> Dims | None:
        """Input dims (int, symbolic name or None), or None when absent or of unknown rank."""
        value = self.tensor(position)
        if value is None or not value.tensor_type.HasField("shape"):
            return None
        return [d.dim_value if d.HasField("dim_value") else (d.dim_param or None)
                for d in value.tensor_type.shape.dim]

    def elem(self, position: int) -> int:
        value = self.tensor(position)
        return value.tensor_type.elem_type if value is not None else TensorProto.UNDEFINED


def tensor_type(elem: int, dims: Dims | None) -> TypeProto:
    """A tensor TypeProto; ``dims`` None means unknown rank, a None dim an unknown size."""
    proto = TypeProto()
    proto.tensor_type.elem_type = elem
    if dims is not None:
        shape = proto.tensor_type.shape
        shape.SetInParent()
        for dim in dims:
            entry = shape.dim.add()
            if isinstance(dim, int):
                entry.dim_value = dim
            elif dim:
                entry.dim_param = dim
    return proto


def add_dims(a: int | str | None, b: int | str | None) -> int | None:
    """Sum of two dims when both are known ints, else unknown."""
    return a + b if isinstance(a, int) and isinstance(b, int) else None


def times_dims(a: int | str | None, b: int | str | None) -> int | None:
    return a * b if isinstance(a, int) and isinstance(b, int) else None


def as_standard(op_type: str, positions: Sequence[int], output_map: Sequence[int] = (0,)) -> Rule:
    """A rule: the output shapes of standard ``op_type`` applied to the inputs at ``positions``.

    Attributes the standard op defines are passed through (FusedConv's conv
    attributes, QLinearAveragePool's pool attributes); ``output_map[j]`` is the
    standard output that gives contrib output j. Shapes are inferred on float
    stand-ins (the standard op may not accept a quantized type); every output takes
    the element type of the first input.
    """
    schema = onnx.defs.get_schema(op_type)

    def rule(facts: Facts) -> list[TypeProto | None]:
        names = [f"in{p}" if facts.tensor(p) is not None else "" for p in positions]
        types = {f"in{p}": tensor_type(TensorProto.FLOAT, facts.dims(p)) for p in positions
                 if facts.tensor(p) is not None}
        attrs = [a for a in (facts.attr_proto(n) for n in schema.attributes) if a is not None]
        node = helper.make_node(op_type, names, [f"out{j}" for j in range(len(schema.outputs))])
        node.attribute.extend(attrs)
        inferred = onnx.shape_inference.infer_node_outputs(schema, node, types)
        outputs: list[TypeProto | None] = []
        for standard in output_map:
            value = inferred.get(f"out{standard}")
            if value is not None:
                value.tensor_type.elem_type = facts.elem(positions[0])
            outputs.append(value)
        return outputs

    return rule


def same_as(position: int, count: int = 1) -> Rule:
    """A rule: ``count`` outputs each shaped and typed as input ``position``."""

    def rule(facts: Facts) -> list[TypeProto | None]:
        value = facts.tensor(position)
        return [value] * count

    return rule


_RULES: dict[tuple[str, str], Rule] = {}


def shape_rule(*op_types: str, domain: str = MS_DOMAIN) -> Callable[[Rule], Rule]:
    """Register ``rule`` as the output-shape rule of contrib ``op_types``."""

    def decorate(rule: Rule) -> Rule:
        for op_type in op_types:
            _RULES[(domain, op_type)] = rule
        return rule

    return decorate


def contrib_ops_with_shape_rules() -> list[tuple[str, str]]:
    """Every (domain, op_type) whose output shapes we teach to onnx, sorted."""
    _load_rules()
    return sorted(_RULES)


def _load_rules() -> None:
    from gate.model import contrib_rules  # noqa: F401  (its @shape_rule calls fill _RULES)


def _inference_function(rule: Rule) -> Callable[[Any], None]:
    def infer(ctx: Any) -> None:
        try:
            outputs = rule(Facts.of(ctx))
            for position, value in enumerate(outputs):
                if value is not None and position < ctx.get_num_outputs() and ctx.has_output(position):
                    ctx.set_output_type(position, value)
        except Exception:  # noqa: BLE001  (a rule that fails leaves the outputs unsized, never aborts)
            return

    return infer


def _any_type() -> list[str]:
    return sorted({t for c in onnx.defs.get_schema("Identity").type_constraints
                   for t in c.allowed_type_strs if t.startswith("tensor(")})


def register_contrib_schemas() -> None:
    """Teach onnx shape inference the contrib ops we model (idempotent; skips known ops)."""
    _load_rules()

    types = _any_type()
    variadic = OpSchema.FormalParameterOption.Variadic
    for (domain, op_type), rule in sorted(_RULES.items()):
        if onnx.defs.has(op_type, domain):
            continue
        schema = OpSchema(
            op_type, domain, 1, doc="registered by roofgate for shape inference only",
            inputs=[OpSchema.FormalParameter("inputs", "T", param_option=variadic,
                                             is_homogeneous=False, min_arity=0)],
            outputs=[OpSchema.FormalParameter("outputs", "T", param_option=variadic,
                                              is_homogeneous=False, min_arity=0)],
            type_constraints=[("T", types, "any tensor")])
        schema.set_type_and_shape_inference_function(_inference_function(rule))
        onnx.defs.register_schema(schema)
