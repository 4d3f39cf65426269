"""Elementwise ops (unary, binary with broadcasting, variadic): vector work only.

Each op costs a fixed number of operations per output element, counted from its
defining formula in the ONNX operator spec: every add, multiply, compare,
select and every transcendental (exp, log, erf, tanh, sqrt, sin, ...) is one
operation (common practice, no source; hardware differs in how many cycles a
transcendental takes). Comparisons and logic ops count as operations too, so
``flops`` here means "arithmetic and logic operations" whatever the dtype.
"""

from __future__ import annotations

from collections.abc import Mapping

from gate.model.graph import Node
from gate.ops._common import arithmetic, elementwise_output_elements, movement, str_attr
from gate.ops.registry import OpWork, Unmodelled, register

# Operations per output element. Formula beside each non-obvious constant.
UNARY_OPS_PER_ELEMENT: Mapping[str, int] = {
    "Relu": 1, "Abs": 1, "Neg": 1, "Exp": 1, "Log": 1, "Sqrt": 1, "Reciprocal": 1,
    "Erf": 1, "Tanh": 1, "Sign": 1, "Floor": 1, "Ceil": 1, "Round": 1, "Not": 1,
    "IsNaN": 1, "IsInf": 1, "BitwiseNot": 1, "Sin": 1, "Cos": 1, "Tan": 1, "Asin": 1,
    "Acos": 1, "Atan": 1, "Sinh": 1, "Cosh": 1, "Asinh": 1, "Acosh": 1, "Atanh": 1,
    "ThresholdedRelu": 1,  # x > alpha ? x : 0 (one compare-select)
    "LeakyRelu": 2,  # compare, multiply by alpha
    "Clip": 2,  # min, max
    "Sigmoid": 4,  # 1 / (1 + exp(-x)): negate, exp, add, divide
    "HardSigmoid": 4,  # max(0, min(1, alpha*x + beta)): mul, add, min, max
    "HardSwish": 5,  # x * HardSigmoid(x)
    "Elu": 4,  # x < 0 ? alpha * (exp(x) - 1) : x: compare, exp, sub, mul
    "Selu": 5,  # Elu plus the gamma scale
    "Celu": 7,  # max(0,x) + min(0, alpha*(exp(x/alpha) - 1))
    "Softplus": 3,  # log(exp(x) + 1)
    "Softsign": 3,  # x / (1 + |x|)
    "Shrink": 3,  # two compares and a bias add/subtract
    "Mish": 5,  # x * tanh(softplus(x)): exp, add, log, tanh, mul
    "Swish": 6,  # x * sigmoid(alpha * x)
}
GELU_OPS_PER_ELEMENT = {"none": 5, "tanh": 9}  # 0.5x(1+erf(x/sqrt2)); tanh form adds x^3 terms

BINARY_OPS = (
    "Add", "Sub", "Mul", "Div", "Pow", "Mod", "BitShift", "Equal", "Less", "Greater",
    "LessOrEqual", "GreaterOrEqual", "And", "Or", "Xor", "BitwiseAnd", "BitwiseOr",
    "BitwiseXor",
)
PRELU_OPS_PER_ELEMENT = 2  # compare, multiply by slope
VARIADIC_OPS = ("Sum", "Max", "Min", "Mean")

# Activation functions named in the RNN/GRU/LSTM ``activations`` attribute.
RECURRENT_ACTIVATION_OPS: Mapping[str, int] = {
    "Relu": 1, "Tanh": 1, "Sigmoid": 4, "HardSigmoid": 4, "LeakyRelu": 2,
    "ThresholdedRelu": 1, "Elu": 4, "Softsign": 3, "Softplus": 3,
    "Affine": 2,  # alpha * x + beta
    "ScaledTanh": 3,  # alpha * tanh(beta * x)
}


def _unary(node: Node) -> OpWork:
    per_element = UNARY_OPS_PER_ELEMENT[node.op_type]
    return arithmetic(per_element * elementwise_output_elements(node))


register(*UNARY_OPS_PER_ELEMENT)(_unary)


@register(*BINARY_OPS, "Where")
def _binary(node: Node) -> OpWork:
    """One op per broadcast output element (Where: one select)."""
    return arithmetic(elementwise_output_elements(node))


@register("PRelu")
def _prelu(node: Node) -> OpWork:
    return arithmetic(PRELU_OPS_PER_ELEMENT * elementwise_output_elements(node))


@register("Gelu")
def _gelu(node: Node) -> OpWork:
    approximate = str_attr(node, "approximate", "none")
    if approximate not in GELU_OPS_PER_ELEMENT:
        raise Unmodelled(f"Gelu approximate={approximate!r} is not a known mode")
    return arithmetic(GELU_OPS_PER_ELEMENT[approximate] * elementwise_output_elements(node))


@register(*VARIADIC_OPS)
def _variadic(node: Node) -> OpWork:
    """n inputs combine with n-1 ops per output element; Mean adds one divide."""
    operands = sum(1 for t in node.inputs if t is not None)
    per_element = max(operands - 1, 0) + (1 if node.op_type == "Mean" else 0)
    if per_element == 0:
        return movement(elementwise_output_elements(node), note="single operand: a copy")
    return arithmetic(per_element * elementwise_output_elements(node))
