"""The op cost-function contract and registry.

A cost function takes one ``Node`` (shapes already inferred and symbolic dims
bound) and returns an ``OpWork``: how much arithmetic the layer does and how
that work maps onto a matrix engine as GEMMs. It never looks at weight values.
When it cannot count honestly (unknown rank, unbound dim, unsupported mode)
it raises ``Unmodelled`` with a reason the report shows; it never returns zero
to mean "don't know".
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from gate.model.graph import Node


class Unmodelled(Exception):
    """The layer's cost cannot be counted; ``reason`` says why (shown to users)."""

    def __init__(self, reason: str) -> None:
        super().__init__(reason)
        self.reason = reason


@dataclass(frozen=True, slots=True)
class GemmShape:
    """``count`` independent GEMMs of (M x K) @ (K x N) -> (M x N).

    Convention: K is the reduction dim, N the output channels/features and M the
    rows streamed through (output pixels x batch, tokens, ...). The K x N operand is
    the one a weight-stationary array holds; ``weights_are_params`` says whether it
    is a model parameter (Conv/Gemm/LSTM weights) or an activation (attention
    Q@K^T). ``sequential`` > 1 means the ``count`` GEMMs form a dependency chain
    of that many steps (recurrent time steps) that cannot overlap.
    """

    m: int
    k: int
    n: int
    count: int = 1
    weights_are_params: bool = True
    sequential: int = 1

    @property
    def macs(self) -> int:
        return self.m * self.k * self.n * self.count


@dataclass(frozen=True, slots=True)
class OpWork:
    """The arithmetic of one layer, independent of any target.

    ``macs`` are multiply-accumulates on the matrix path; ``flops`` counts every
    arithmetic operation (2 per MAC plus elementwise, reductions, activations).
    ``vector_ops`` is the non-MAC work a vector unit would do. ``is_view`` marks
    metadata-only ops (Reshape, Squeeze, ...) that move no data on a real runtime.
    """

    macs: int = 0
    flops: int = 0
    gemms: tuple[GemmShape, ...] = ()
    vector_ops: int = 0
    is_view: bool = False
    note: str = ""


CostFunction = Callable[[Node], OpWork]

_REGISTRY: dict[tuple[str, str], CostFunction] = {}

# Domains that are the standard ONNX operator set.
_DEFAULT_DOMAINS = ("", "ai.onnx")


def register(*op_types: str, domain: str = "") -> Callable[[CostFunction], CostFunction]:
    """Register a cost function for one or more op types of a domain."""

    def decorate(func: CostFunction) -> CostFunction:
        for op_type in op_types:
            key = (_normal_domain(domain), op_type)
            if key in _REGISTRY:
                raise RuntimeError(f"two cost functions registered for {key}")
            _REGISTRY[key] = func
        return func

    return decorate


def cost_function_for(domain: str, op_type: str) -> CostFunction | None:
    return _REGISTRY.get((_normal_domain(domain), op_type))


def modelled_op_types() -> list[tuple[str, str]]:
    """Every (domain, op_type) with a cost function, sorted."""
    return sorted(_REGISTRY)


def _normal_domain(domain: str) -> str:
    return "" if domain in _DEFAULT_DOMAINS else domain
