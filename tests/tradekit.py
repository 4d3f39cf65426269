"""The test-declared target the facts-of-the-trade checks run on.

Common practice, no source: a large monolithic systolic-array edge accelerator of about
2 TFLOP/s peak with a 4 MiB parameter buffer and a 2 MiB activation buffer; on such an
array CNNs average about half of peak and batch-1 LSTMs stay under 1 %. Those figures
belong to these tests only: the built-in ``ws-64x64-4mib`` uses numbers of our own
(3.28 TFLOP/s at fp16, a 3 MiB activation buffer), so here it is resized to the trade's.
"""

from __future__ import annotations

from dataclasses import replace

from gate.targets import load_target
from gate.targets.spec import TargetProfile

TRADE_CLOCK_HZ = 500e6  # 2 x 4096 PEs x 0.5 fp16 MAC x 500 MHz = 2.05 TFLOP/s
TRADE_ACTIVATION_BUFFER = 2 << 20


def trade_sized_target() -> TargetProfile:
    """The large weight-stationary built-in resized to the trade's figures (above)."""
    large = load_target("ws-64x64-4mib")
    return replace(large, name="trade-sized-ws", clock_hz=TRADE_CLOCK_HZ,
                   activation_buffer_bytes=TRADE_ACTIVATION_BUFFER,
                   description="test-declared: about 2 TFLOP/s, 4 MiB parameter and 2 MiB "
                               "activation buffer (common practice, no source)")
