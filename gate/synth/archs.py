"""Reference architectures, rebuilt layer by layer from their papers' tables.

Each function returns an ``onnx.ModelProto`` whose MACs and parameter counts
``tests/test_published_counts.py`` checks against the published figures. Conv,
BatchNormalization and Relu are separate nodes, as in a training export, unless
``fold_bn=True``. Dims named by a ``str`` (``batch``, ``seq``) are symbolic.

Every builder takes the same build keywords: ``weights`` ("external", "inline"
or "random", see ``gate.synth.builder``), ``opset`` (default 17), ``fold_bn``
and ``validate`` (run ``onnx.checker`` and strict shape inference).
"""

from __future__ import annotations

import math
from typing import Literal

import onnx

from gate.synth.builder import DEFAULT_OPSET, Dim, WeightsMode
from gate.synth.layers import NetBuilder

# (blocks per stage, bottleneck?) by depth: He et al. 2016, Table 1.
RESNET_LAYOUTS: dict[int, tuple[tuple[int, int, int, int], bool]] = {
    18: ((2, 2, 2, 2), False), 34: ((3, 4, 6, 3), False), 50: ((3, 4, 6, 3), True),
    101: ((3, 4, 23, 3), True), 152: ((3, 8, 36, 3), True),
}
RESNET_WIDTHS = (64, 128, 256, 512)

# (output channels, stride) of each depthwise-separable layer: Howard et al. 2017, Table 1,
# with the last depthwise layer at stride 1 (the table's "s2" at 7x7 is an erratum).
MOBILENET_V1_LAYERS: tuple[tuple[int, int], ...] = (
    (64, 1), (128, 2), (128, 1), (256, 2), (256, 1), (512, 2),
    (512, 1), (512, 1), (512, 1), (512, 1), (512, 1), (1024, 2), (1024, 1),
)

# (expansion t, channels c, repeats n, first stride s): Sandler et al. 2018, Table 2.
MOBILENET_V2_LAYERS: tuple[tuple[int, int, int, int], ...] = (
    (1, 16, 1, 1), (6, 24, 2, 2), (6, 32, 3, 2), (6, 64, 4, 2),
    (6, 96, 3, 1), (6, 160, 3, 2), (6, 320, 1, 1),
)

# Conv widths per block ("M" = 2x2 max-pool): Simonyan & Zisserman 2015, Table 1, D and E.
VGG_LAYOUTS: dict[int, tuple[tuple[int, ...], ...]] = {
    16: ((64, 64), (128, 128), (256, 256, 256), (512, 512, 512), (512, 512, 512)),
    19: ((64, 64), (128, 128), (256,) * 4, (512,) * 4, (512,) * 4),
}


def _builder(name: str, weights: WeightsMode, opset: int, fold_bn: bool) -> NetBuilder:
    return NetBuilder(name, weights=weights, opset=opset, fold_bn=fold_bn)


def _classifier(b: NetBuilder, x: str, num_classes: int) -> str:
    """Global average pool, flatten and the fully connected layer (``head.fc``)."""
    pooled = b.global_avg_pool(x, name="head.pool")
    flat = b.flatten(pooled, name="head.flatten")
    return b.output(b.gemm(flat, num_classes, name="head.fc"))


def resnet(depth: int = 50, *, num_classes: int = 1000, resolution: int = 224,
           batch: Dim = "batch", downsample: Literal["1x1", "3x3"] = "1x1",
           weights: WeightsMode = "external", opset: int = DEFAULT_OPSET,
           fold_bn: bool = False, validate: bool = True) -> onnx.ModelProto:
    """ResNet-18/34/50/101/152 as in He et al. 2016, Table 1.

    Shortcuts are identities, with a 1x1 projection (option B) where the shape
    changes. ``downsample`` places a bottleneck stage's stride: "1x1" on the
    first 1x1 conv as in the paper (ResNet-50: ~3.8 G multiply-adds), or "3x3"
    on the 3x3 conv as many later implementations do (~4.1 G).
    """
    blocks, bottleneck = RESNET_LAYOUTS[depth]
    b = _builder(f"resnet{depth}", weights, opset, fold_bn)
    x = b.input("image", [batch, 3, resolution, resolution])
    x = b.conv_bn_act(x, 64, 7, stride=2, name="stem.conv")
    x = b.max_pool(x, 3, 2, padding=1, name="stem.pool")
    for stage, (count, width) in enumerate(zip(blocks, RESNET_WIDTHS), start=1):
        for index in range(1, count + 1):
            stride = 2 if index == 1 and stage > 1 else 1
            prefix = f"stage{stage}.block{index}"
            if bottleneck:
                x = _bottleneck(b, x, width, stride, prefix, downsample)
            else:
                x = basic_block(b, x, width, stride, prefix)
    _classifier(b, x, num_classes)
    return b.build(validate=validate)


def _shortcut(b: NetBuilder, x: str, out_channels: int, stride: int, prefix: str) -> str:
    if stride == 1 and b.channels(x) == out_channels:
        return x
    return b.conv_bn_act(x, out_channels, 1, stride=stride, act=None, name=f"{prefix}.shortcut")


def _merge(b: NetBuilder, residual: str, shortcut: str, prefix: str) -> str:
    summed = b.add(residual, shortcut, name=f"{prefix}.add")
    return b.activation(summed, "relu", name=f"{prefix}.relu")


def basic_block(b: NetBuilder, x: str, width: int, stride: int, prefix: str) -> str:
    """ResNet basic block: two 3x3 conv-BN (ReLU after the first), shortcut, Add, ReLU."""
    y = b.conv_bn_act(x, width, 3, stride=stride, name=f"{prefix}.conv1")
    y = b.conv_bn_act(y, width, 3, act=None, name=f"{prefix}.conv2")
    return _merge(b, y, _shortcut(b, x, width, stride, prefix), prefix)


def _bottleneck(b: NetBuilder, x: str, width: int, stride: int, prefix: str,
                downsample: str) -> str:
    first, middle = (stride, 1) if downsample == "1x1" else (1, stride)
    y = b.conv_bn_act(x, width, 1, stride=first, name=f"{prefix}.conv1")
    y = b.conv_bn_act(y, width, 3, stride=middle, name=f"{prefix}.conv2")
    y = b.conv_bn_act(y, 4 * width, 1, act=None, name=f"{prefix}.conv3")
    return _merge(b, y, _shortcut(b, x, 4 * width, stride, prefix), prefix)


def resnet18(**options: object) -> onnx.ModelProto:
    """ResNet-18 (He et al. 2016); keywords as for ``resnet``."""
    return resnet(18, **options)  # type: ignore[arg-type]


def resnet50(**options: object) -> onnx.ModelProto:
    """ResNet-50, the paper's variant (stride on the first 1x1); keywords as for ``resnet``."""
    return resnet(50, **options)  # type: ignore[arg-type]


def mobilenet_v1(width: float = 1.0, resolution: int = 224, *, num_classes: int = 1000,
                 batch: Dim = "batch", weights: WeightsMode = "external",
                 opset: int = DEFAULT_OPSET, fold_bn: bool = False,
                 validate: bool = True) -> onnx.ModelProto:
    """MobileNetV1 (Howard et al. 2017, Table 1) with width multiplier and resolution.

    Every layer's channels are scaled by ``width`` (the first conv included);
    each depthwise and pointwise conv is followed by BN and ReLU.
    """
    b = _builder(f"mobilenet_v1_{width:g}_{resolution}", weights, opset, fold_bn)
    x = b.input("image", [batch, 3, resolution, resolution])
    x = b.conv_bn_act(x, round(32 * width), 3, stride=2, name="stem.conv")
    for index, (channels, stride) in enumerate(MOBILENET_V1_LAYERS, start=1):
        x = b.conv_bn_act(x, b.channels(x), 3, stride=stride, group=b.channels(x),
                          name=f"block{index}.dw")
        x = b.conv_bn_act(x, round(channels * width), 1, name=f"block{index}.pw")
    _classifier(b, x, num_classes)
    return b.build(validate=validate)


def _divisible(value: float, divisor: int = 8) -> int:
    """Round channels to a multiple of 8, never below 90% (common practice, no source)."""
    rounded = max(divisor, int(value + divisor / 2) // divisor * divisor)
    return rounded + divisor if rounded < 0.9 * value else rounded


def mobilenet_v2(width: float = 1.0, resolution: int = 224, *, num_classes: int = 1000,
                 batch: Dim = "batch", weights: WeightsMode = "external",
                 opset: int = DEFAULT_OPSET, fold_bn: bool = False,
                 validate: bool = True) -> onnx.ModelProto:
    """MobileNetV2 (Sandler et al. 2018, Table 2): inverted residuals, linear bottlenecks.

    Activations are ReLU6 (Clip); the projection conv of each block has none,
    and a block adds its input when stride is 1 and channels match.
    """
    b = _builder(f"mobilenet_v2_{width:g}_{resolution}", weights, opset, fold_bn)
    x = b.input("image", [batch, 3, resolution, resolution])
    x = b.conv_bn_act(x, _divisible(32 * width), 3, stride=2, act="relu6", name="stem.conv")
    index = 0
    for expansion, channels, repeats, first_stride in MOBILENET_V2_LAYERS:
        for repeat in range(repeats):
            index += 1
            stride = first_stride if repeat == 0 else 1
            x = _inverted_residual(b, x, expansion, _divisible(channels * width), stride,
                                   f"block{index}")
    last = _divisible(1280 * max(1.0, width))
    x = b.conv_bn_act(x, last, 1, act="relu6", name="head.conv")
    _classifier(b, x, num_classes)
    return b.build(validate=validate)


def _inverted_residual(b: NetBuilder, x: str, expansion: int, out_channels: int, stride: int,
                       prefix: str) -> str:
    in_channels = b.channels(x)
    y = x
    if expansion != 1:
        y = b.conv_bn_act(y, in_channels * expansion, 1, act="relu6", name=f"{prefix}.expand")
    y = b.conv_bn_act(y, b.channels(y), 3, stride=stride, group=b.channels(y), act="relu6",
                      name=f"{prefix}.dw")
    y = b.conv_bn_act(y, out_channels, 1, act=None, name=f"{prefix}.project")
    if stride == 1 and in_channels == out_channels:
        y = b.add(y, x, name=f"{prefix}.add")
    return y


def vgg(depth: int = 16, *, num_classes: int = 1000, resolution: int = 224,
        batch: Dim = "batch", weights: WeightsMode = "external", opset: int = DEFAULT_OPSET,
        validate: bool = True) -> onnx.ModelProto:
    """VGG-16 (config D) or VGG-19 (E) of Simonyan & Zisserman 2015, Table 1.

    3x3 convs with bias and ReLU, 2x2 max-pools, then FC-4096, FC-4096 and
    FC-classes (dropout omitted: inference graph). No BatchNormalization.
    """
    b = _builder(f"vgg{depth}", weights, opset, fold_bn=True)
    x = b.input("image", [batch, 3, resolution, resolution])
    for block, widths in enumerate(VGG_LAYOUTS[depth], start=1):
        for index, channels in enumerate(widths, start=1):
            conv = b.conv(x, channels, 3, name=f"block{block}.conv{index}")
            x = b.activation(conv, "relu", name=f"block{block}.relu{index}")
        x = b.max_pool(x, 2, 2, name=f"block{block}.pool")
    x = b.flatten(x, name="head.flatten")
    for index in (1, 2):
        x = b.activation(b.gemm(x, 4096, name=f"head.fc{index}"), "relu",
                         name=f"head.relu{index}")
    b.output(b.gemm(x, num_classes, name="head.fc3"))
    return b.build(validate=validate)


def vgg16(**options: object) -> onnx.ModelProto:
    """VGG-16 (configuration D); keywords as for ``vgg``."""
    return vgg(16, **options)  # type: ignore[arg-type]


def recurrent_classifier(cell: Literal["lstm", "gru"] = "lstm", *, layers: int = 2,
                         hidden_size: int = 128, input_size: int = 40, num_classes: int = 12,
                         seq: Dim = "seq", batch: Dim = "batch", bidirectional: bool = False,
                         name: str | None = None, weights: WeightsMode = "external",
                         opset: int = DEFAULT_OPSET, validate: bool = True) -> onnx.ModelProto:
    """A stacked LSTM or GRU over ``[seq, batch, input_size]`` frames, then a Gemm classifier.

    The classifier reads the last layer's final hidden state (``Y_h``); layers
    are named ``rnn1``, ``rnn2``, ... and the classifier ``head.fc``.
    """
    b = _builder(name or f"{cell}_keyword", weights, opset, fold_bn=False)
    x = b.input("frames", [seq, batch, input_size])
    dirs = 2 if bidirectional else 1
    last_state = x
    for index in range(1, layers + 1):
        layer = b.lstm if cell == "lstm" else b.gru
        y, last_state = layer(x, hidden_size, name=f"rnn{index}", bidirectional=bidirectional)
        if dirs == 1:
            x = b.squeeze(y, 1, name=f"rnn{index}.squeeze")
        else:  # [seq, 2, batch, H] -> [seq, batch, 2, H] -> [seq, batch, 2H]
            y = b.transpose(y, [0, 2, 1, 3], name=f"rnn{index}.transpose")
            x = b.reshape(y, [0, 0, 2 * hidden_size], name=f"rnn{index}.merge")
    state = b.transpose(last_state, [1, 0, 2], name="head.transpose")
    state = b.reshape(state, [0, dirs * hidden_size], name="head.merge")
    b.output(b.gemm(state, num_classes, name="head.fc"))
    return b.build(validate=validate)


def lstm_keyword(**options: object) -> onnx.ModelProto:
    """A 2-layer LSTM keyword model (40 features, hidden 128, 12 classes by default)."""
    return recurrent_classifier("lstm", **options)  # type: ignore[arg-type]


def gru_keyword(**options: object) -> onnx.ModelProto:
    """A 2-layer GRU keyword model; keywords as for ``recurrent_classifier``."""
    return recurrent_classifier("gru", **options)  # type: ignore[arg-type]


def transformer_encoder(*, layers: int = 2, d_model: int = 128, heads: int = 4,
                        ffn_size: int = 512, input_size: int | None = None,
                        seq: Dim = "seq", batch: Dim = "batch", name: str = "transformer_encoder",
                        weights: WeightsMode = "external", opset: int = DEFAULT_OPSET,
                        validate: bool = True) -> onnx.ModelProto:
    """A post-norm transformer encoder (Vaswani et al. 2017) on ``[batch, seq, features]``.

    With ``input_size`` a linear ``embed`` layer projects the features to
    ``d_model``. Each layer ``enc<i>`` has multi-head self-attention (Q, K, V
    and output projections, ``heads`` heads, scaled dot product, Softmax), a
    residual Add and LayerNormalization, then a ReLU feed-forward block with its
    own residual Add and LayerNormalization.
    """
    if d_model % heads:
        raise ValueError(f"d_model {d_model} is not divisible by heads {heads}")
    b = _builder(name, weights, opset, fold_bn=False)
    x = b.input("features", [batch, seq, input_size or d_model])
    if input_size is not None:
        x = b.linear(x, d_model, name="embed")
    for index in range(1, layers + 1):
        x = _encoder_layer(b, x, heads, ffn_size, f"enc{index}")
    b.output(x)
    return b.build(validate=validate)


def _encoder_layer(b: NetBuilder, x: str, heads: int, ffn_size: int, prefix: str) -> str:
    d_model = int(b.shape(x)[-1])  # type: ignore[arg-type]
    head_size = d_model // heads

    def split(t: str, role: str, perm: list[int]) -> str:
        t = b.reshape(t, [0, 0, heads, head_size], name=f"{prefix}.attn.{role}_split")
        return b.transpose(t, perm, name=f"{prefix}.attn.{role}_heads")

    q = split(b.linear(x, d_model, name=f"{prefix}.attn.q"), "q", [0, 2, 1, 3])
    k = split(b.linear(x, d_model, name=f"{prefix}.attn.k"), "k", [0, 2, 3, 1])
    v = split(b.linear(x, d_model, name=f"{prefix}.attn.v"), "v", [0, 2, 1, 3])
    scores = b.scale(b.matmul(q, k, name=f"{prefix}.attn.scores"), 1 / math.sqrt(head_size),
                     name=f"{prefix}.attn.scale")
    probs = b.softmax(scores, name=f"{prefix}.attn.softmax")
    context = b.transpose(b.matmul(probs, v, name=f"{prefix}.attn.context"), [0, 2, 1, 3],
                          name=f"{prefix}.attn.merge_heads")
    context = b.reshape(context, [0, 0, d_model], name=f"{prefix}.attn.merge")
    attended = b.add(x, b.linear(context, d_model, name=f"{prefix}.attn.out"),
                     name=f"{prefix}.attn.residual")
    x = b.layer_norm(attended, name=f"{prefix}.norm1")
    hidden = b.activation(b.linear(x, ffn_size, name=f"{prefix}.ffn.up"), "relu",
                          name=f"{prefix}.ffn.relu")
    fed = b.add(x, b.linear(hidden, d_model, name=f"{prefix}.ffn.down"),
                name=f"{prefix}.ffn.residual")
    return b.layer_norm(fed, name=f"{prefix}.norm2")
