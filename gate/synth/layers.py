"""Layer helpers on top of ``GraphBuilder``: one method per ONNX op or common idiom.

Each method takes input tensor names, creates the layer's parameters under
``<node name>.<role>`` (``stage1.block1.conv1.weight``) and returns the output
tensor name, so a network is written as a chain of calls. Shapes are NCHW for
images and ``[seq, batch, features]`` for the recurrent ops (ONNX layout 0).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any, Literal

from gate.synth.builder import Dim, GraphBuilder, Shape

Activation = Literal["relu", "relu6"] | None


def conv_out_dim(size: Dim, kernel: int, stride: int, pad_total: int, dilation: int = 1) -> Dim:
    """Output length of a convolution or pooling window along one spatial axis."""
    if not isinstance(size, int):
        return None
    return (size + pad_total - dilation * (kernel - 1) - 1) // stride + 1


class NetBuilder(GraphBuilder):
    """``GraphBuilder`` plus the layers the reference and scenario models use."""

    # -- convolutional ---------------------------------------------------------

    def conv(self, x: str, out_channels: int, kernel: int, *, name: str, stride: int = 1,
             padding: int | None = None, group: int = 1, bias: bool = True) -> str:
        """A square-kernel Conv; ``padding`` defaults to ``kernel // 2`` on every side."""
        pad = kernel // 2 if padding is None else padding
        batch, in_channels, height, width = self.shape(x)
        if not isinstance(in_channels, int) or in_channels % group or out_channels % group:
            raise ValueError(f"{name}: channels {in_channels}->{out_channels} vs group {group}")
        inputs = [x, self.param(f"{name}.weight",
                                [out_channels, in_channels // group, kernel, kernel])]
        if bias:
            inputs.append(self.param(f"{name}.bias", [out_channels]))
        out_shape = (batch, out_channels, conv_out_dim(height, kernel, stride, 2 * pad),
                     conv_out_dim(width, kernel, stride, 2 * pad))
        return self.node("Conv", inputs, [out_shape], name=name, kernel_shape=[kernel, kernel],
                         strides=[stride, stride], pads=[pad] * 4, group=group)[0]

    def batch_norm(self, x: str, *, name: str, epsilon: float = 1e-5) -> str:
        """Inference-mode BatchNormalization over dim 1 (scale, bias, mean, var per channel)."""
        channels = [self.channels(x)]
        inputs = [x, self.param(f"{name}.scale", channels, fill="ones"),
                  self.param(f"{name}.bias", channels), self.param(f"{name}.mean", channels),
                  self.param(f"{name}.var", channels, fill="ones")]
        return self.node("BatchNormalization", inputs, [self.shape(x)], name=name,
                         epsilon=epsilon)[0]

    def activation(self, x: str, kind: Activation, *, name: str) -> str:
        """Relu, ReLU6 (as Clip 0..6, how exporters write it) or nothing."""
        if kind is None:
            return x
        if kind == "relu":
            return self.node("Relu", [x], [self.shape(x)], name=name)[0]
        if kind == "relu6":
            low = self.const_scalar(f"{name}.min", 0.0)
            high = self.const_scalar(f"{name}.max", 6.0)
            return self.node("Clip", [x, low, high], [self.shape(x)], name=name)[0]
        raise ValueError(f"unknown activation {kind!r}")

    def conv_bn_act(self, x: str, out_channels: int, kernel: int, *, name: str,
                    stride: int = 1, group: int = 1, act: Activation = "relu") -> str:
        """Conv, then BatchNormalization (``<name>.bn``), then the activation (``<name>.<act>``).

        With ``fold_bn`` the BN is folded away: the Conv carries a bias instead.
        Without it the Conv has no bias (the BN's shift replaces it), as exporters write it.
        """
        y = self.conv(x, out_channels, kernel, name=name, stride=stride, group=group,
                      bias=self.fold_bn)
        if not self.fold_bn:
            y = self.batch_norm(y, name=f"{name}.bn")
        return self.activation(y, act, name=f"{name}.{act}")

    def max_pool(self, x: str, kernel: int, stride: int, *, name: str, padding: int = 0) -> str:
        batch, channels, height, width = self.shape(x)
        out_shape = (batch, channels, conv_out_dim(height, kernel, stride, 2 * padding),
                     conv_out_dim(width, kernel, stride, 2 * padding))
        return self.node("MaxPool", [x], [out_shape], name=name, kernel_shape=[kernel, kernel],
                         strides=[stride, stride], pads=[padding] * 4)[0]

    def global_avg_pool(self, x: str, *, name: str) -> str:
        batch, channels = self.shape(x)[:2]
        return self.node("GlobalAveragePool", [x], [(batch, channels, 1, 1)], name=name)[0]

    def flatten(self, x: str, *, name: str) -> str:
        """Flatten to ``[batch, rest]`` (axis 1); the rest must be static."""
        batch, *rest = self.shape(x)
        size = 1
        for dim in rest:
            if not isinstance(dim, int):
                raise ValueError(f"{name}: cannot flatten non-static dims {rest}")
            size *= dim
        return self.node("Flatten", [x], [(batch, size)], name=name, axis=1)[0]

    # -- dense and sequence ----------------------------------------------------

    def gemm(self, x: str, out_features: int, *, name: str, bias: bool = True) -> str:
        """Fully connected layer as Gemm with a ``[out, in]`` weight (transB=1)."""
        batch, in_features = self.shape(x)
        if not isinstance(in_features, int):
            raise ValueError(f"{name}: Gemm input features must be static, not {in_features!r}")
        inputs = [x, self.param(f"{name}.weight", [out_features, in_features])]
        if bias:
            inputs.append(self.param(f"{name}.bias", [out_features]))
        return self.node("Gemm", inputs, [(batch, out_features)], name=name, transB=1)[0]

    def linear(self, x: str, out_features: int, *, name: str, bias: bool = True) -> str:
        """Projection of the last dim as MatMul (``name``) plus a bias Add (``<name>.bias``)."""
        shape = self.shape(x)
        out_shape = shape[:-1] + (out_features,)
        weight = self.param(f"{name}.weight", [int(shape[-1]), out_features])  # type: ignore[arg-type]
        y = self.node("MatMul", [x, weight], [out_shape], name=name)[0]
        if not bias:
            return y
        bias_param = self.param(f"{name}.bias", [out_features])
        return self.node("Add", [y, bias_param], [out_shape], name=f"{name}.bias_add")[0]

    def matmul(self, a: str, b: str, *, name: str) -> str:
        """MatMul of two activations with equal leading dims: ``[..., m, k] @ [..., k, n]``."""
        out_shape = self.shape(a)[:-1] + self.shape(b)[-1:]
        return self.node("MatMul", [a, b], [out_shape], name=name)[0]

    def add(self, a: str, b: str, *, name: str) -> str:
        return self.node("Add", [a, b], [self.shape(a)], name=name)[0]

    def scale(self, x: str, factor: float, *, name: str) -> str:
        """Multiply by a scalar constant (``<name>.factor``)."""
        factor_name = self.const_scalar(f"{name}.factor", factor)
        return self.node("Mul", [x, factor_name], [self.shape(x)], name=name)[0]

    def softmax(self, x: str, *, name: str, axis: int = -1) -> str:
        return self.node("Softmax", [x], [self.shape(x)], name=name, axis=axis)[0]

    def layer_norm(self, x: str, *, name: str, epsilon: float = 1e-5) -> str:
        """LayerNormalization over the last dim (opset >= 17), with scale and bias."""
        width = [int(self.shape(x)[-1])]  # type: ignore[arg-type]
        inputs = [x, self.param(f"{name}.scale", width, fill="ones"),
                  self.param(f"{name}.bias", width)]
        return self.node("LayerNormalization", inputs, [self.shape(x)], name=name, axis=-1,
                         epsilon=epsilon)[0]

    def reshape(self, x: str, target: Sequence[int], *, name: str) -> str:
        """Reshape to ``target``; 0 copies the input dim (ONNX default), -1 is not supported."""
        if any(d < 0 for d in target):
            raise ValueError(f"{name}: use 0 (copy) and explicit sizes, not -1")
        shape = self.shape(x)
        out_shape: Shape = tuple(shape[i] if d == 0 else d for i, d in enumerate(target))
        spec = self.const_ints(f"{name}.shape", list(target))
        return self.node("Reshape", [x, spec], [out_shape], name=name)[0]

    def transpose(self, x: str, perm: Sequence[int], *, name: str) -> str:
        shape = self.shape(x)
        return self.node("Transpose", [x], [tuple(shape[p] for p in perm)], name=name,
                         perm=list(perm))[0]

    def squeeze(self, x: str, axis: int, *, name: str) -> str:
        """Drop one size-1 axis (axes given as an input, opset >= 13)."""
        shape = self.shape(x)
        axes = self.const_ints(f"{name}.axes", [axis])
        return self.node("Squeeze", [x, axes], [shape[:axis] + shape[axis + 1:]], name=name)[0]

    def lstm(self, x: str, hidden_size: int, *, name: str,
             bidirectional: bool = False) -> tuple[str, str]:
        """An LSTM layer; returns ``(Y, Y_h)``. Parameters follow the ONNX spec shapes:
        W ``[dirs, 4H, I]``, R ``[dirs, 4H, H]``, B ``[dirs, 8H]``."""
        return self._recurrent("LSTM", 4, x, hidden_size, name, bidirectional)

    def gru(self, x: str, hidden_size: int, *, name: str,
            bidirectional: bool = False) -> tuple[str, str]:
        """A GRU layer; returns ``(Y, Y_h)``. W ``[dirs, 3H, I]``, R ``[dirs, 3H, H]``,
        B ``[dirs, 6H]`` (ONNX spec); ``linear_before_reset=1`` as exporters write it."""
        return self._recurrent("GRU", 3, x, hidden_size, name, bidirectional,
                               linear_before_reset=1)

    def _recurrent(self, op_type: str, gates: int, x: str, hidden: int, name: str,
                   bidirectional: bool, **extra: Any) -> tuple[str, str]:
        seq, batch, input_size = self.shape(x)
        dirs = 2 if bidirectional else 1
        inputs = [x, self.param(f"{name}.W", [dirs, gates * hidden, int(input_size)]),  # type: ignore[arg-type]
                  self.param(f"{name}.R", [dirs, gates * hidden, hidden]),
                  self.param(f"{name}.B", [dirs, 2 * gates * hidden])]
        outs = [f"{name}.Y", f"{name}.Y_h"]
        shapes = [(seq, dirs, batch, hidden), (dirs, batch, hidden)]
        self.node(op_type, inputs, shapes, name=name, out_names=outs, hidden_size=hidden,
                  direction="bidirectional" if bidirectional else "forward", **extra)
        return outs[0], outs[1]
