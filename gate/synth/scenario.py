"""The demo's models: the FICTIONAL "Fernhollow Field Robotics" team (see SCENARIO.md).

Everything here is invented for the demo and the examples: the team, its
devices and these four models, which are small enough to build and profile in
well under a second each. ``scenario_models("base")`` is the team's main
branch; ``scenario_models("pr")`` is the demo pull request that

- widens the species classifier's last stage from 192 to 384 channels, so that
  one layer, ``stage4.block1.conv2`` (3x3, 384 -> 384), holds 1,327,104
  parameters = 5,308,416 bytes = 5.06 MiB at fp32 (1.27 MiB at int8). The
  base model's largest layer (the same conv at 192 -> 192) holds 331,776
  parameters = 1.27 MiB at fp32, and the PR's next-largest layer
  (``stage4.block1.conv1``, 3x3, 128 -> 384) 442,368 = 1.69 MiB at fp32. So
  at fp32, any per-layer parameter buffer from 1.7 to 5 MiB (e.g. a 2 or 4 MiB
  buffer) passes the base and fails the PR naming exactly that layer;
- prunes the wake-word GRU's hidden size from 256 to 160 (an improvement:
  parameters fall from 624,387 to 252,003, about 2.5 MB to 1.0 MB at fp32).

Layer names are stable and readable (``stage4.block1.conv2``, ``rnn1``,
``enc1.attn.q``) so the demo's report can name them.
"""

from __future__ import annotations

from pathlib import Path
from typing import Literal

import onnx

from gate.synth.archs import basic_block, recurrent_classifier, transformer_encoder
from gate.synth.builder import WeightsMode, save_model
from gate.synth.layers import NetBuilder

Variant = Literal["base", "pr"]

SPECIES_PATH = "models/trailcam/species.onnx"
DETECTOR_PATH = "models/trailcam/detector_lite.onnx"
WAKEWORD_PATH = "models/handheld/wakeword.onnx"
NOTES_PATH = "models/handheld/notes_encoder.onnx"

SPECIES_BASE_WIDTHS = (32, 64, 128, 192)
SPECIES_PR_LAST_WIDTH = 384
WAKEWORD_BASE_HIDDEN = 256
WAKEWORD_PR_HIDDEN = 160


def species(*, last_width: int = SPECIES_BASE_WIDTHS[-1], num_species: int = 24,
            resolution: int = 160, weights: WeightsMode = "external") -> onnx.ModelProto:
    """FICTIONAL trail-camera species classifier: a small residual CNN (one basic block per stage).

    Input ``image`` [1, 3, 160, 160]; stem 3x3/2 conv and 3x3/2 max-pool, then
    four stages of widths 32, 64, 128 and ``last_width`` at 40, 20, 10 and 5
    pixels; global pool and ``head.fc`` to ``num_species`` logits.
    """
    b = NetBuilder("species", weights=weights)
    x = b.input("image", [1, 3, resolution, resolution])
    x = b.conv_bn_act(x, 32, 3, stride=2, name="stem.conv")
    x = b.max_pool(x, 3, 2, padding=1, name="stem.pool")
    widths = SPECIES_BASE_WIDTHS[:-1] + (last_width,)
    for stage, width in enumerate(widths, start=1):
        x = basic_block(b, x, width, 1 if stage == 1 else 2, f"stage{stage}.block1")
    pooled = b.flatten(b.global_avg_pool(x, name="head.pool"), name="head.flatten")
    b.output(b.gemm(pooled, num_species, name="head.fc"))
    return b.build()


def detector_lite(*, resolution: int = 128, anchors: int = 3, num_classes: int = 4,
                  weights: WeightsMode = "external") -> onnx.ModelProto:
    """FICTIONAL low-power wake-up animal detector: depthwise-separable CNN with a 1x1 head.

    Input ``image`` [1, 3, 128, 128]; a MobileNetV1-style backbone at half
    width down to stride 16 (8x8), then ``head.box``: a 1x1 conv giving, per
    cell and anchor, 4 box offsets, 1 objectness and ``num_classes`` scores.
    """
    b = NetBuilder("detector_lite", weights=weights)
    x = b.input("image", [1, 3, resolution, resolution])
    x = b.conv_bn_act(x, 16, 3, stride=2, name="stem.conv")
    layout = ((32, 1), (64, 2), (64, 1), (128, 2), (128, 1), (256, 2), (256, 1), (256, 1))
    for index, (channels, stride) in enumerate(layout, start=1):
        x = b.conv_bn_act(x, b.channels(x), 3, stride=stride, group=b.channels(x),
                          name=f"backbone.block{index}.dw")
        x = b.conv_bn_act(x, channels, 1, name=f"backbone.block{index}.pw")
    b.output(b.conv(x, anchors * (5 + num_classes), 1, name="head.box"))
    return b.build()


def wakeword(*, hidden_size: int = WAKEWORD_BASE_HIDDEN, frames: int = 100,
             weights: WeightsMode = "external") -> onnx.ModelProto:
    """FICTIONAL handheld wake-word spotter: 2-layer GRU over 1 s of 40 log-mel frames.

    Input ``frames`` [100, 1, 40] (ONNX recurrent layout: seq, batch, features);
    layers ``rnn1``, ``rnn2``; ``head.fc`` gives 3 logits (wake word, other
    speech, silence). Large parameters, each used once per frame: DRAM-bound.
    """
    return recurrent_classifier("gru", layers=2, hidden_size=hidden_size, input_size=40,
                                num_classes=3, seq=frames, batch=1, name="wakeword",
                                weights=weights)


def notes_encoder(*, weights: WeightsMode = "external") -> onnx.ModelProto:
    """FICTIONAL voice-note encoder: 2-layer transformer encoder, sequence length symbolic.

    Input ``features`` [1, "seq", 80] (log-mel frames); ``embed`` projects to
    192, then layers ``enc1``/``enc2`` with 4 heads and a 384-wide feed-forward.
    Bind the length when profiling, e.g. ``--dim seq=256``.
    """
    return transformer_encoder(layers=2, d_model=192, heads=4, ffn_size=384, input_size=80,
                               seq="seq", batch=1, name="notes_encoder", weights=weights)


def scenario_models(variant: Variant = "base",
                    weights: WeightsMode = "external") -> dict[str, onnx.ModelProto]:
    """The FICTIONAL team's four models by repository-relative path, for ``variant``.

    "base" is the main branch; "pr" widens the species model's last stage and
    prunes the wake-word model (see the module docstring for the numbers).
    """
    if variant not in ("base", "pr"):
        raise ValueError(f"variant must be 'base' or 'pr', not {variant!r}")
    pull_request = variant == "pr"
    last_width = SPECIES_PR_LAST_WIDTH if pull_request else SPECIES_BASE_WIDTHS[-1]
    hidden = WAKEWORD_PR_HIDDEN if pull_request else WAKEWORD_BASE_HIDDEN
    return {
        SPECIES_PATH: species(last_width=last_width, weights=weights),
        DETECTOR_PATH: detector_lite(weights=weights),
        WAKEWORD_PATH: wakeword(hidden_size=hidden, weights=weights),
        NOTES_PATH: notes_encoder(weights=weights),
    }


def write_scenario(root: str | Path, variant: Variant = "base",
                   weights: WeightsMode = "external") -> list[Path]:
    """Write the FICTIONAL team's models under ``root`` at their relative paths.

    With external weights only the ``.onnx`` files are written (a few KB each);
    the weight files they refer to are deliberately never created.
    """
    return [save_model(model, Path(root) / relative)
            for relative, model in scenario_models(variant, weights).items()]
