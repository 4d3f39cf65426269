"""Cost functions for ONNX ops, one module per op family, registered by op type.

Importing this package imports every family module so their ``@register``
decorators run; ``cost_function_for`` is the one lookup the profiler uses.
"""

from gate.ops import _families  # noqa: F401  (imports the family modules for registration)
from gate.ops.registry import (  # noqa: F401  (re-exported API)
    GemmShape,
    OpWork,
    Unmodelled,
    cost_function_for,
    modelled_op_types,
    register,
)
