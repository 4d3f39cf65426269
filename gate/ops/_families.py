"""Imports every op-family module so that its cost functions register themselves."""

from gate.ops import (  # noqa: F401  (imported for their @register side effects)
    attention,
    contrib_attention,
    contrib_elementwise,
    contrib_fused,
    contrib_quantized,
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
