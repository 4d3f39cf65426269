"""Imports every op-family module so that its cost functions register themselves."""

from gate.ops import (  # noqa: F401  (imported for their @register side effects)
    attention,
    control,
    conv,
    einsum,
    elementwise,
    matmul,
    misc,
    movement,
    normalization,
    pooling,
    quantized,
    recurrent,
    reduction,
    resize,
)
