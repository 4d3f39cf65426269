"""Build ONNX models in code: a fluent graph builder, reference architectures, demo models.

Nothing here downloads anything. ``NetBuilder`` writes graphs layer by layer on
top of ``onnx.helper``; ``gate.synth.archs`` rebuilds published networks
(ResNet, MobileNetV1/V2, VGG, LSTM/GRU, a transformer encoder) so tests can
check the profiler against the papers' counts; ``gate.synth.scenario`` holds
the fictional demo team's models.
"""

from __future__ import annotations

from gate.synth.builder import (  # noqa: F401  (re-exported API)
    DEFAULT_OPSET,
    WEIGHTS_MODES,
    GraphBuilder,
    WeightsMode,
    external_locations,
    save_model,
    validate_model,
)
from gate.synth.layers import NetBuilder  # noqa: F401  (re-exported API)
