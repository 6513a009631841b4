"""A zoo of float ONNX models built with onnx.helper, for testing qfit without torch.

Every builder is a pure function returning a `ZooModel`. Weights are random but deterministic
(`np.random.default_rng(seed)`), He-normal scaled so activations stay in a sane range, and
BatchNormalization nodes carry non-trivial random statistics wherever the architecture has BN,
so that BN folding is exercised. Input shapes are fixed, batch 1. Default opset 17 (any opset
13..21 works: 13 is the first with an optional Resize `roi`); ir_version 9 (10 from opset 21).

Expected figures are computed INDEPENDENTLY inside each builder, by plain arithmetic on the
layer shapes as the layer is added -- never by reading the finished graph back.

Counting convention
-------------------
MACs: only the multiply-accumulates of Conv, ConvTranspose, Gemm and MatMul.
    conv   = Cout * prod(out_spatial) * (Cin / groups) * prod(kernel)
    gemm   = in_features * out_features            (batch 1)
    matmul = prod(output shape) * K                (K = contracted dimension)
    Elementwise ops, pooling, BN and bias adds are not counted. LSTM/GRU cells are not
    counted either (their figure, where a model has one, is in `extra`).
params: elements of the float weights and biases of Conv/Gemm/MatMul (and of LSTM, whose
    W, R, B initializers are weights too), counted AFTER BN folding: a conv followed by BN
    counts as its weight plus one bias per output channel; the BN's own four vectors are not
    counted. A MatMul weight counts whether it is an initializer or a Constant node, directly
    or through a Transpose; an Add of a constant vector right after a MatMul is its bias.
    Clip bounds, Resize scales, Pad amounts and Reshape shapes are not params.
torch_convention_params (in `extra`, for the published-architecture models): what
    `sum(p.numel() for p in model.parameters())` gives for the unfolded float model, i.e.
    conv weights (no conv bias where BN follows) + BN gamma and beta + linear weight and bias.

Peak live int8 activation bytes (`int8_layer_order_peak_bytes`, `int8_chain_peak_bytes`)
-------------------------------------------------------------------------------------
Every activation is 1 byte per element. Nodes run in the order of the graph's node list.
A tensor lives from the node that produces it (the graph input: from the start) to its last
consumer (a graph output: to the end). The bytes live at a step are the node's inputs and
outputs plus every tensor produced earlier that a later node still needs. BN is folded into
the conv before it (no tensor of its own), and a Relu or Clip whose input has no other consumer
runs in place (no new tensor). Initializers and Constant outputs are weights (flash), not
activations. `int8_chain_peak_bytes` is the same figure for a model that is a plain chain, where
it reduces to max over nodes of (input bytes + output bytes).
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

DEFAULT_OPSET = 17


@dataclass
class ZooModel:
    name: str
    model: onnx.ModelProto
    params: int
    macs: int
    input_shape: tuple[int, ...]
    output_shape: tuple[int, ...] = ()
    input_name: str = "input"
    output_name: str = "output"
    int8_layer_order_peak_bytes: int | None = None
    int8_chain_peak_bytes: int | None = None
    extra: dict = field(default_factory=dict)


def _ir_version(opset: int) -> int:
    if opset < 13:
        raise ValueError(f"zoo models need opset >= 13 (Resize with an empty roi); got {opset}")
    return 9 if opset <= 20 else 10  # opset 21 needs IR 10; onnxruntime 1.32 reads both


class _Net:
    """Accumulates nodes, initializers, shapes and the expected params/MACs of one model.

    `m2` tracks a rough second moment E[x^2] per tensor so that BN running statistics can be
    set near what the data would give (as in a trained net) instead of at arbitrary values.
    """

    def __init__(self, name: str, opset: int, seed: int):
        self.name = name
        self.opset = opset
        self.ir_version = _ir_version(opset)
        self.rng = np.random.default_rng(seed)
        self.nodes: list[onnx.NodeProto] = []
        self.initializers: list[onnx.TensorProto] = []
        self.shape: dict[str, tuple[int, ...]] = {}
        self.m2: dict[str, float] = {}
        self.params = 0
        self.macs = 0
        self.torch_params = 0
        self.inputs: list[onnx.ValueInfoProto] = []
        self._ids = itertools.count()
        self._shared: dict[str, str] = {}

    # -- plumbing ---------------------------------------------------------------------------
    def fresh(self, prefix: str) -> str:
        return f"{prefix}_{next(self._ids)}"

    def init(self, name: str, array: np.ndarray) -> str:
        self.initializers.append(numpy_helper.from_array(np.ascontiguousarray(array), name))
        return name

    def shared_const(self, key: str, array: np.ndarray) -> str:
        """One initializer reused by every node that needs the same constant (Clip bounds...)."""
        if key not in self._shared:
            self._shared[key] = self.init(key, array)
        return self._shared[key]

    def node(self, op: str, inputs: list[str], shape: tuple[int, ...], m2: float, prefix: str | None = None,
             **attrs) -> str:
        out = self.fresh(prefix or op.lower())
        self.nodes.append(helper.make_node(op, inputs, [out], name=out, **attrs))
        self.shape[out] = tuple(int(d) for d in shape)
        self.m2[out] = float(m2)
        return out

    def input(self, name: str, shape: tuple[int, ...], m2: float = 1.0) -> str:
        self.inputs.append(helper.make_tensor_value_info(name, TensorProto.FLOAT, list(shape)))
        self.shape[name] = tuple(shape)
        self.m2[name] = m2
        return name

    def he_normal(self, shape: tuple[int, ...], fan_in: int, gain: float) -> np.ndarray:
        return (self.rng.standard_normal(shape) * math.sqrt(gain / fan_in)).astype(np.float32)

    def finish(self, output: str, input_name: str = "input", **fields) -> ZooModel:
        # Rename the last tensor to "output" in place (an Identity would add a node and a copy).
        final = "output"
        for node in self.nodes:
            node.output[:] = [final if o == output else o for o in node.output]
            node.input[:] = [final if i == output else i for i in node.input]
        out_shape = self.shape[output]
        graph = helper.make_graph(
            self.nodes, self.name, self.inputs,
            [helper.make_tensor_value_info(final, TensorProto.FLOAT, list(out_shape))],
            initializer=self.initializers)
        model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", self.opset)],
                                  ir_version=self.ir_version, producer_name="qfit-tests-zoo")
        extra = fields.pop("extra", {})
        extra.setdefault("torch_convention_params", self.torch_params)
        return ZooModel(name=self.name, model=model, params=self.params, macs=self.macs,
                        input_shape=self.shape[input_name], output_shape=out_shape,
                        input_name=input_name, output_name=final, extra=extra, **fields)

    # -- layers -----------------------------------------------------------------------------
    def conv(self, x: str, cout: int, kernel, stride=1, pad=None, dilation=1, groups=1, bn=False,
             act: str | None = None, auto_pad: str | None = None, prefix="conv") -> str:
        n, cin, *spatial = self.shape[x]
        rank = len(spatial)
        kernel = _tuple(kernel, rank)
        stride = _tuple(stride, rank)
        dilation = _tuple(dilation, rank)
        if auto_pad is None:
            # pad given as per-axis symmetric ints, or full ONNX [begin..., end...] list
            if pad is None:
                pad = [dilation[i] * (kernel[i] - 1) // 2 for i in range(rank)]
            pad = list(_tuple(pad, rank))
            pads = pad + pad if len(pad) == rank else pad
            out_spatial = [(spatial[i] + pads[i] + pads[i + rank] - dilation[i] * (kernel[i] - 1) - 1)
                           // stride[i] + 1 for i in range(rank)]
        else:
            assert auto_pad in ("SAME_UPPER", "SAME_LOWER")
            out_spatial = [-(-spatial[i] // stride[i]) for i in range(rank)]  # ceil(in / stride)
        per_group = cin // groups
        fan_in = per_group * math.prod(kernel)
        # He gain 2 before a rectifier keeps E[x^2] steady; gain 1 for a linear (projection) conv.
        gain = 2.0 if act else 1.0
        w = self.init(self.fresh(f"{prefix}.weight"), self.he_normal((cout, per_group, *kernel), fan_in, gain))
        inputs = [x, w]
        if not bn:
            inputs.append(self.init(self.fresh(f"{prefix}.bias"),
                                    (self.rng.standard_normal(cout) * 0.05).astype(np.float32)))
        attrs = dict(kernel_shape=list(kernel), strides=list(stride), dilations=list(dilation), group=groups)
        if auto_pad is None:
            attrs["pads"] = pads
        else:
            attrs["auto_pad"] = auto_pad
        m2_out = gain * self.m2[x]
        y = self.node("Conv", inputs, (n, cout, *out_spatial), m2_out, prefix=prefix, **attrs)

        self.macs += cout * math.prod(out_spatial) * per_group * math.prod(kernel)
        self.params += cout * per_group * math.prod(kernel) + cout  # folded: one bias per channel
        self.torch_params += cout * per_group * math.prod(kernel) + (2 * cout if bn else cout)
        if bn:
            y = self.batchnorm(y)
        return self.activation(y, act)

    def batchnorm(self, x: str) -> str:
        c = self.shape[x][1]
        expected_var = self.m2[x]
        # Trained-looking statistics: running var within x2 of the data's, small running mean,
        # gamma around 1 and small beta -- all different from the identity so folding matters.
        gamma = self.rng.uniform(0.5, 1.5, c).astype(np.float32)
        beta = (self.rng.standard_normal(c) * 0.2).astype(np.float32)
        mean = (self.rng.standard_normal(c) * 0.2 * math.sqrt(expected_var)).astype(np.float32)
        var = (expected_var * np.exp(self.rng.uniform(-0.7, 0.7, c))).astype(np.float32)
        names = [self.init(self.fresh(f"bn.{k}"), v)
                 for k, v in (("scale", gamma), ("bias", beta), ("mean", mean), ("var", var))]
        m2_out = float(np.mean(gamma ** 2 * expected_var / var + (beta - gamma * mean / np.sqrt(var)) ** 2))
        return self.node("BatchNormalization", [x, *names], self.shape[x], m2_out, prefix="bn", epsilon=1e-5)

    def activation(self, x: str, act: str | None) -> str:
        if act is None:
            return x
        if act == "relu":
            return self.node("Relu", [x], self.shape[x], self.m2[x] / 2)
        if act == "relu6":  # ReLU6 as exporters write it: Clip(x, 0, 6)
            lo = self.shared_const("relu6_min", np.array(0.0, np.float32))
            hi = self.shared_const("relu6_max", np.array(6.0, np.float32))
            return self.node("Clip", [x, lo, hi], self.shape[x], min(self.m2[x] / 2, 36.0), prefix="relu6")
        if act == "leaky_relu":
            return self.node("LeakyRelu", [x], self.shape[x], self.m2[x] / 2, alpha=0.1)
        if act == "hard_swish":
            if self.opset >= 14:
                return self.node("HardSwish", [x], self.shape[x], self.m2[x] / 2)
            # before opset 14 exporters write x * HardSigmoid(x)
            gate = self.node("HardSigmoid", [x], self.shape[x], 0.3, alpha=1.0 / 6, beta=0.5)
            return self.mul(x, gate)
        raise ValueError(f"unknown activation {act!r}")

    def gemm(self, x: str, out_features: int, act: str | None = None, prefix="fc") -> str:
        n, in_features = self.shape[x]
        gain = 2.0 if act else 1.0
        # Stored [out, in] with transB=1, the layout torch's Linear exports.
        w = self.init(self.fresh(f"{prefix}.weight"), self.he_normal((out_features, in_features), in_features, gain))
        b = self.init(self.fresh(f"{prefix}.bias"), (self.rng.standard_normal(out_features) * 0.05).astype(np.float32))
        y = self.node("Gemm", [x, w, b], (n, out_features), gain * self.m2[x], prefix=prefix, transB=1)
        self.macs += in_features * out_features
        self.params += in_features * out_features + out_features
        self.torch_params += in_features * out_features + out_features
        return self.activation(y, act)

    def add(self, a: str, b: str) -> str:
        assert self.shape[a] == self.shape[b], (self.shape[a], self.shape[b])
        return self.node("Add", [a, b], self.shape[a], self.m2[a] + self.m2[b])

    def mul(self, a: str, b: str) -> str:
        shape = tuple(np.broadcast_shapes(self.shape[a], self.shape[b]))
        return self.node("Mul", [a, b], shape, self.m2[a] * self.m2[b])

    def unary(self, op: str, x: str, m2: float | None = None, **attrs) -> str:
        return self.node(op, [x], self.shape[x], self.m2[x] if m2 is None else m2, **attrs)

    def pool(self, op: str, x: str, kernel, stride=None, pad=0) -> str:
        n, c, *spatial = self.shape[x]
        rank = len(spatial)
        kernel = _tuple(kernel, rank)
        stride = _tuple(stride if stride is not None else kernel, rank)
        pad = _tuple(pad, rank)
        out_spatial = [(spatial[i] + 2 * pad[i] - kernel[i]) // stride[i] + 1 for i in range(rank)]
        return self.node(op, [x], (n, c, *out_spatial), self.m2[x], kernel_shape=list(kernel),
                         strides=list(stride), pads=list(pad) + list(pad))

    def global_avg_pool(self, x: str) -> str:
        n, c, *spatial = self.shape[x]
        return self.node("GlobalAveragePool", [x], (n, c, *[1] * len(spatial)), self.m2[x], prefix="gap")

    def flatten(self, x: str) -> str:
        shape = self.shape[x]
        return self.node("Flatten", [x], (shape[0], math.prod(shape[1:])), self.m2[x], axis=1)

    def concat(self, xs: list[str], axis: int = 1) -> str:
        shape = list(self.shape[xs[0]])
        shape[axis] = sum(self.shape[x][axis] for x in xs)
        m2 = sum(self.m2[x] * self.shape[x][axis] for x in xs) / shape[axis]
        return self.node("Concat", xs, tuple(shape), m2, axis=axis)


def _tuple(v, rank: int) -> tuple[int, ...]:
    if isinstance(v, int):
        return (v,) * rank
    return tuple(int(i) for i in v)


# =============================================================================================
# 1. MobileNetV2 (Sandler et al., "MobileNetV2: Inverted Residuals and Linear Bottlenecks",
#    CVPR 2018, Table 2)
# =============================================================================================

# Table 2 rows: expansion t, output channels c, repeats n, first stride s.
MOBILENET_V2_TABLE = (
    (1, 16, 1, 1),
    (6, 24, 2, 2),
    (6, 32, 3, 2),
    (6, 64, 4, 2),
    (6, 96, 3, 1),
    (6, 160, 3, 2),
    (6, 320, 1, 1),
)

# Peak live int8 activation bytes in node-list order, worked out by hand with the liveness rule
# of the module docstring (1 byte/element, BN folded, Clip in place).
#
# width 1.0, 224x224 input (C x H x W):
#   input               3x224x224 = 150,528   dies after the first conv
#   first conv (s2)    32x112x112 = 401,408   step: 150,528 + 401,408 = 551,936
#   block 1 (t=1): depthwise 32x112x112 = 401,408      step: 401,408 + 401,408 = 802,816
#                  project   16x112x112 = 200,704      step: 401,408 + 200,704 = 602,112
#   block 2, first repeat (t=6, c=24, s=2; stride 2 so no residual keeps its input alive):
#                  expand    96x112x112 = 1,204,224    step: 200,704 + 1,204,224 = 1,404,928
#                  depthwise 96x56x56   =   301,056    step: 1,204,224 + 301,056 = 1,505,280  <- peak
#                  project   24x56x56   =    75,264    step: 301,056 + 75,264 = 376,320
#   every later step is at 56x56 or smaller: the largest is block 3's first expand,
#   24x56x56 in + 144x56x56 out (+ nothing else live) = 75,264 + 451,584 = 526,848.
#
# width 0.35, 96x96 input (channels from _make_divisible below: 16, 8, 8, 16, 24, 32, 56, 112):
#   input 3x96x96 = 27,648; first conv 16x48x48 = 36,864       step 64,512
#   block 1: depthwise 16x48x48 = 36,864                      step 73,728
#            project    8x48x48 = 18,432                      step 55,296
#   block 2 first repeat (t=6 -> 48 channels, s=2):
#            expand    48x48x48 = 110,592                     step 18,432 + 110,592 = 129,024
#            depthwise 48x24x24 =  27,648                     step 110,592 + 27,648 = 138,240  <- peak
#   later steps are at 24x24 or smaller (block 2 second repeat: 8x24x24 residual input
#   4,608 + expand 48x24x24 27,648 + depthwise 27,648 = 59,904).
_MOBILENET_V2_HAND_PEAKS = {
    (1.0, 224): 96 * 112 * 112 + 96 * 56 * 56,   # 1,505,280
    (0.35, 96): 48 * 48 * 48 + 48 * 24 * 24,              # 138,240
}


def _make_divisible(value: float, divisor: int = 8) -> int:
    """Channel rounding of the MobileNetV2 reference code: nearest multiple of 8, never more
    than 10 % below the unrounded value."""
    rounded = max(divisor, int(value + divisor / 2) // divisor * divisor)
    if rounded < 0.9 * value:
        rounded += divisor
    return rounded


def mobilenet_v2(width: float = 1.0, resolution: int = 224, num_classes: int = 1000,
                 opset: int = DEFAULT_OPSET, seed: int = 0) -> ZooModel:
    net = _Net(f"mobilenet_v2_w{width}_r{resolution}", opset, seed)
    x = net.input("input", (1, 3, resolution, resolution))
    channels = _make_divisible(32 * width)
    x = net.conv(x, channels, 3, stride=2, bn=True, act="relu6", prefix="stem")
    for t, c, n, s in MOBILENET_V2_TABLE:
        out_channels = _make_divisible(c * width)
        for i in range(n):
            stride = s if i == 0 else 1
            block_in = x
            hidden = int(round(channels * t))
            if t != 1:
                x = net.conv(x, hidden, 1, bn=True, act="relu6", prefix="expand")
            x = net.conv(x, hidden, 3, stride=stride, groups=hidden, bn=True, act="relu6", prefix="dw")
            x = net.conv(x, out_channels, 1, bn=True, act=None, prefix="project")  # linear bottleneck
            if stride == 1 and channels == out_channels:
                x = net.add(block_in, x)
            channels = out_channels
    last = _make_divisible(1280 * max(1.0, width))
    x = net.conv(x, last, 1, bn=True, act="relu6", prefix="last")
    x = net.flatten(net.global_avg_pool(x))
    x = net.gemm(x, num_classes, prefix="classifier")
    return net.finish(x, int8_layer_order_peak_bytes=_MOBILENET_V2_HAND_PEAKS.get((width, resolution)))


def mobilenet_v2_small(opset: int = DEFAULT_OPSET, seed: int = 0) -> ZooModel:
    """MobileNetV2 at width 0.35, 96x96 input, 10 classes: same structure, fast to run."""
    zm = mobilenet_v2(width=0.35, resolution=96, num_classes=10, opset=opset, seed=seed)
    zm.name = zm.model.graph.name = "mobilenet_v2_small"
    return zm


# =============================================================================================
# 2. ResNet-18 (He et al., "Deep Residual Learning for Image Recognition", CVPR 2016, Table 1)
#    and a small CIFAR-style residual net.
# =============================================================================================

def _basic_block(net: _Net, x: str, planes: int, stride: int) -> str:
    inplanes = net.shape[x][1]
    y = net.conv(x, planes, 3, stride=stride, bn=True, act="relu", prefix="block.conv1")
    y = net.conv(y, planes, 3, bn=True, act=None, prefix="block.conv2")
    shortcut = x
    if stride != 1 or inplanes != planes:  # projection shortcut (option B of the paper)
        shortcut = net.conv(x, planes, 1, stride=stride, pad=0, bn=True, act=None, prefix="block.downsample")
    return net.activation(net.add(y, shortcut), "relu")


def resnet18(resolution: int = 224, num_classes: int = 1000, opset: int = DEFAULT_OPSET, seed: int = 0) -> ZooModel:
    net = _Net(f"resnet18_r{resolution}", opset, seed)
    x = net.input("input", (1, 3, resolution, resolution))
    x = net.conv(x, 64, 7, stride=2, pad=3, bn=True, act="relu", prefix="stem")
    x = net.pool("MaxPool", x, 3, stride=2, pad=1)
    for planes, first_stride in ((64, 1), (128, 2), (256, 2), (512, 2)):  # [2, 2, 2, 2] blocks
        x = _basic_block(net, x, planes, first_stride)
        x = _basic_block(net, x, planes, 1)
    x = net.flatten(net.global_avg_pool(x))
    x = net.gemm(x, num_classes)
    return net.finish(x)


def resnet_small(resolution: int = 32, num_classes: int = 10, opset: int = DEFAULT_OPSET, seed: int = 0) -> ZooModel:
    """Three stages (16, 32, 64 channels), one basic block each; the first keeps an identity
    shortcut, the others use a strided 1x1 projection."""
    net = _Net("resnet_small", opset, seed)
    x = net.input("input", (1, 3, resolution, resolution))
    x = net.conv(x, 16, 3, bn=True, act="relu", prefix="stem")
    for planes, stride in ((16, 1), (32, 2), (64, 2)):
        x = _basic_block(net, x, planes, stride)
    x = net.flatten(net.global_avg_pool(x))
    x = net.gemm(x, num_classes)
    return net.finish(x)


# =============================================================================================
# 5. DS-CNN keyword spotting, in the style of Zhang et al., "Hello Edge: Keyword Spotting on
#    Microcontrollers", 2017 (the small DS-CNN: 64 channels, 4 depthwise-separable blocks).
# =============================================================================================

def ds_cnn_kws(num_classes: int = 12, opset: int = DEFAULT_OPSET, seed: int = 0) -> ZooModel:
    """Input 1x1x49x10: 49 frames of 10 log-mel / MFCC features (40 ms windows, 20 ms hop)."""
    net = _Net("ds_cnn_kws", opset, seed)
    x = net.input("input", (1, 1, 49, 10))
    # TF "SAME" padding for a 10x4 kernel at stride 2: out 25x5, total pad 9 rows / 2 columns,
    # the odd row at the bottom -> pads [top 4, left 1, bottom 5, right 1].
    x = net.conv(x, 64, (10, 4), stride=2, pad=[4, 1, 5, 1], bn=True, act="relu", prefix="stem")
    for _ in range(4):
        x = net.conv(x, 64, 3, groups=64, bn=True, act="relu", prefix="dw")
        x = net.conv(x, 64, 1, bn=True, act="relu", prefix="pw")
    x = net.pool("AveragePool", x, net.shape[x][2:])  # average over the whole 25x5 map
    x = net.gemm(net.flatten(x), num_classes)
    # Chain peak: the stem writes 64x25x5 = 8,000 bytes from a 490-byte input; every dw / pw
    # conv then reads 8,000 and writes 8,000 -> 16,000.
    return net.finish(x, int8_chain_peak_bytes=64 * 25 * 5 * 2)


# =============================================================================================
# 6. 1-D conv classifier on accelerometer windows
# =============================================================================================

def conv1d_sensor(num_classes: int = 6, opset: int = DEFAULT_OPSET, seed: int = 0) -> ZooModel:
    """Input 1x3x128: 128 samples of a 3-axis accelerometer. Exercises stride, dilation,
    explicit padding, asymmetric SAME_UPPER padding (even kernel) and MaxPool on 1-D data."""
    net = _Net("conv1d_sensor", opset, seed)
    x = net.input("input", (1, 3, 128))
    x = net.conv(x, 16, 5, pad=2, act="relu", prefix="c1")                     # 16x128
    x = net.conv(x, 32, 3, stride=2, pad=1, bn=True, act="relu", prefix="c2")  # 32x64
    x = net.pool("MaxPool", x, 2)                                              # 32x32
    x = net.conv(x, 32, 3, dilation=2, pad=2, act="relu", prefix="c3")         # 32x32
    x = net.conv(x, 32, 4, auto_pad="SAME_UPPER", act="relu", prefix="c4")     # 32x32, pads 1 | 2
    x = net.flatten(net.global_avg_pool(x))
    x = net.gemm(x, num_classes)
    x = net.unary("Softmax", x, m2=1.0 / num_classes, axis=1)
    # Chain peak: c2 reads 16x128 = 2,048 and writes 32x64 = 2,048 -> 4,096 (c1: 384 + 2,048).
    return net.finish(x, int8_chain_peak_bytes=16 * 128 + 32 * 64)


# =============================================================================================
# 7. Dense autoencoder for anomaly detection (machine-sound style: 5 frames x 128 mel bins)
# =============================================================================================

def dense_autoencoder(opset: int = DEFAULT_OPSET, seed: int = 0) -> ZooModel:
    net = _Net("dense_autoencoder", opset, seed)
    x = net.input("input", (1, 640))
    for width in (128, 128, 8, 128, 128):
        x = net.gemm(x, width, act="relu")
    x = net.gemm(x, 640)  # reconstruction, linear
    # Chain peak: 640 in + 128 out (first layer) = 128 in + 640 out (last layer) = 768.
    return net.finish(x, int8_chain_peak_bytes=640 + 128)


# =============================================================================================
# 8. Inception-like block with a grab-bag of activations, Pad and Resize
# =============================================================================================

def concat_branches(num_classes: int = 10, opset: int = DEFAULT_OPSET, seed: int = 0) -> ZooModel:
    net = _Net("concat_branches", opset, seed)
    x = net.input("input", (1, 3, 32, 32))
    stem = net.conv(x, 16, 3, stride=2, bn=True, act="hard_swish", prefix="stem")       # 16x16x16
    b1 = net.conv(stem, 8, 1, act="relu", prefix="b1")                                  # 8x16x16
    b2 = net.conv(stem, 8, 1, act="relu", prefix="b2_reduce")
    b2 = net.conv(b2, 16, 3, act="leaky_relu", prefix="b2")                             # 16x16x16
    b3 = net.pool("MaxPool", stem, 3, stride=1, pad=1)
    b3 = net.conv(b3, 8, 1, act="relu", prefix="b3")                                    # 8x16x16
    x = net.concat([b1, b2, b3])                                                        # 32x16x16
    # Squeeze-and-excite: channel gates from HardSigmoid, applied with a broadcast Mul.
    gate = net.global_avg_pool(x)
    gate = net.conv(gate, 8, 1, act="relu", prefix="se_reduce")
    gate = net.conv(gate, 32, 1, prefix="se_expand")
    gate = net.unary("HardSigmoid", gate, m2=0.3, alpha=1.0 / 6, beta=0.5)
    x = net.mul(x, gate)
    # Downsample, SiLU written as x * Sigmoid(x), then nearest-neighbour upsample by 2.
    x = net.conv(x, 32, 3, stride=2, bn=True, prefix="down")                           # 32x8x8
    x = net.mul(x, net.unary("Sigmoid", x, m2=0.3))
    scales = net.shared_const("resize_scales", np.array([1, 1, 2, 2], np.float32))
    n, c, h, w = net.shape[x]
    x = net.node("Resize", [x, "", scales], (n, c, 2 * h, 2 * w), net.m2[x], mode="nearest")  # 32x16x16
    # Explicit Pad then an unpadded conv, as some exporters emit.
    pads = net.shared_const("pad_amounts", np.array([0, 0, 1, 1, 0, 0, 1, 1], np.int64))
    x = net.node("Pad", [x, pads], (n, c, 2 * h + 2, 2 * w + 2), net.m2[x], mode="constant")  # 32x18x18
    x = net.conv(x, 16, 3, pad=0, act="relu", prefix="head")                           # 16x16x16
    x = net.gemm(net.flatten(net.global_avg_pool(x)), num_classes)
    return net.finish(x)


# =============================================================================================
# 9. An operator qfit will not quantize (LSTM) between quantizable parts
# =============================================================================================

def unsupported_middle(num_classes: int = 5, hidden: int = 24, opset: int = DEFAULT_OPSET, seed: int = 0) -> ZooModel:
    """Conv1d front-end over a 64-step sequence of 8 features -> LSTM -> Gemm head."""
    net = _Net("unsupported_middle", opset, seed)
    x = net.input("input", (1, 8, 64))
    x = net.conv(x, 16, 3, act="relu", prefix="front1")                # 1x16x64
    x = net.conv(x, 16, 3, stride=2, act="relu", prefix="front2")      # 1x16x32
    n, features, steps = net.shape[x]
    x = net.node("Transpose", [x], (steps, n, features), net.m2[x], perm=[2, 0, 1])  # [seq, batch, input]
    # ONNX LSTM weights: W [dirs, 4*hidden, input], R [dirs, 4*hidden, hidden], B [dirs, 8*hidden]
    # (gate order i, o, f, c). Small uniform init, as recurrent layers are usually initialised.
    bound = 1.0 / math.sqrt(hidden)
    w = net.init("lstm.W", net.rng.uniform(-bound, bound, (1, 4 * hidden, features)).astype(np.float32))
    r = net.init("lstm.R", net.rng.uniform(-bound, bound, (1, 4 * hidden, hidden)).astype(np.float32))
    b = net.init("lstm.B", net.rng.uniform(-bound, bound, (1, 8 * hidden)).astype(np.float32))
    lstm_params = 4 * hidden * features + 4 * hidden * hidden + 8 * hidden
    net.params += lstm_params
    net.torch_params += lstm_params
    y_h = net.fresh("lstm_h")
    # Only the last hidden state is used; the full sequence output Y is left out ("").
    net.nodes.append(helper.make_node("LSTM", [x, w, r, b], ["", y_h], name="lstm", hidden_size=hidden))
    net.shape[y_h] = (1, n, hidden)
    net.m2[y_h] = 0.1
    shape = net.shared_const("head_shape", np.array([n, hidden], np.int64))
    x = net.node("Reshape", [y_h, shape], (n, hidden), 0.1)
    x = net.gemm(x, num_classes)
    return net.finish(x, extra={"unsupported_ops": ("LSTM",), "lstm_params": lstm_params,
                                "lstm_macs": steps * 4 * hidden * (features + hidden)})


# =============================================================================================
# 10. MatMul weights behind Constant / Transpose, and an activation-by-activation batched MatMul
# =============================================================================================

def matmul_transposed_weights(num_classes: int = 10, opset: int = DEFAULT_OPSET, seed: int = 0) -> ZooModel:
    """Input 1x16x32 (16 tokens of 32 features).
      - W1 is an initializer stored [out, in] and reaches MatMul through Transpose(perm=[1, 0]);
      - W2 is the value of a Constant node;
      - self-attention-like scores h @ h^T and probs @ h are batched MatMuls of two activations.
    """
    net = _Net("matmul_transposed_weights", opset, seed)
    tokens, d_in, d_hidden = 16, 32, 64
    x = net.input("input", (1, tokens, d_in))

    w1 = net.init("w1_out_in", net.he_normal((d_hidden, d_in), d_in, 2.0))
    w1_t = net.node("Transpose", [w1], (d_in, d_hidden), 0.0, prefix="w1_t", perm=[1, 0])
    h = net.node("MatMul", [x, w1_t], (1, tokens, d_hidden), 2 * net.m2[x])
    b1 = net.init("b1", (net.rng.standard_normal(d_hidden) * 0.05).astype(np.float32))
    h = net.unary("Relu", net.node("Add", [h, b1], net.shape[h], net.m2[h]), m2=net.m2[h] / 2)
    net.macs += tokens * d_in * d_hidden
    net.params += d_hidden * d_in + d_hidden
    net.torch_params += d_hidden * d_in + d_hidden

    w2 = net.fresh("w2_const")
    net.nodes.append(helper.make_node("Constant", [], [w2], name=w2,
                                      value=numpy_helper.from_array(net.he_normal((d_hidden, d_in), d_hidden, 1.0))))
    net.shape[w2] = (d_hidden, d_in)
    h = net.node("MatMul", [h, w2], (1, tokens, d_in), net.m2[h])
    b2 = net.init("b2", (net.rng.standard_normal(d_in) * 0.05).astype(np.float32))
    h = net.node("Add", [h, b2], net.shape[h], net.m2[h])
    net.macs += tokens * d_hidden * d_in
    net.params += d_hidden * d_in + d_in
    net.torch_params += d_hidden * d_in + d_in

    h_t = net.node("Transpose", [h], (1, d_in, tokens), net.m2[h], perm=[0, 2, 1])
    scores = net.node("MatMul", [h, h_t], (1, tokens, tokens), net.m2[h] ** 2 * d_in)   # [1,16,32]@[1,32,16]
    inv_sqrt_d = net.shared_const("inv_sqrt_d", np.array(1.0 / math.sqrt(d_in), np.float32))
    scores = net.node("Mul", [scores, inv_sqrt_d], net.shape[scores], 1.0)
    probs = net.unary("Softmax", scores, m2=1.0 / tokens, axis=-1)
    context = net.node("MatMul", [probs, h], (1, tokens, d_in), net.m2[h])              # [1,16,16]@[1,16,32]
    net.macs += tokens * tokens * d_in * 2

    pooled = net.global_avg_pool(net.node("Transpose", [context], (1, d_in, tokens), net.m2[context], perm=[0, 2, 1]))
    x = net.gemm(net.flatten(pooled), num_classes)
    return net.finish(x)


# =============================================================================================
# 11. Random branched DAGs (for execution-order search tests)
# =============================================================================================

def random_dag(seed: int = 0, n_nodes: int = 8, channels: int = 8, size: int = 8,
               opset: int = DEFAULT_OPSET) -> ZooModel:
    """Exactly `n_nodes` nodes: a stem Conv, then 2-3 parallel branches of single-node ops
    (Conv 1x1/3x3, Relu, Sigmoid, MaxPool 3x3/1, Add, Mul), interleaved in a random but valid
    node order, then one Concat of the branch ends. Spatial size never changes; channel counts
    vary (4/8/16) so tensors differ in size, and Add/Mul only pair tensors of equal shape, which
    may come from another branch or the stem (long-lived skip edges)."""
    if n_nodes < 4:
        raise ValueError(f"random_dag needs n_nodes >= 4 (stem, 2 branches, concat); got {n_nodes}")
    net = _Net(f"random_dag_s{seed}_n{n_nodes}", opset, seed)
    rng = net.rng
    x = net.input("input", (1, channels, size, size))
    stem = net.conv(x, channels, 3, prefix="stem")
    body = n_nodes - 2
    n_branches = min(int(rng.integers(2, 4)), body)
    # Every branch gets at least one node; the rest are spread at random, in random order.
    owners = list(range(n_branches)) + [int(b) for b in rng.integers(0, n_branches, body - n_branches)]
    rng.shuffle(owners)
    heads = [stem] * n_branches
    made = [stem]
    for branch in owners:
        head = heads[branch]
        choice = rng.choice(["conv1", "conv3", "relu", "sigmoid", "maxpool", "add", "mul"])
        partners = [t for t in made if t != head and net.shape[t] == net.shape[head]]
        if choice in ("add", "mul") and not partners:
            choice = "relu"
        if choice in ("conv1", "conv3"):
            k = 1 if choice == "conv1" else 3
            y = net.conv(head, int(rng.choice([4, 8, 16])), k, prefix=f"b{branch}_conv")
        elif choice == "relu":
            y = net.unary("Relu", head, m2=net.m2[head] / 2)
        elif choice == "sigmoid":
            y = net.unary("Sigmoid", head, m2=0.3)
        elif choice == "maxpool":
            y = net.pool("MaxPool", head, 3, stride=1, pad=1)
        else:
            partner = partners[int(rng.integers(len(partners)))]
            y = net.add(head, partner) if choice == "add" else net.mul(head, partner)
        heads[branch] = y
        made.append(y)
    out = net.concat(heads)
    return net.finish(out)


# The small, fast builders, for tests that sweep the whole zoo.
ZOO = {
    "resnet_small": resnet_small,
    "mobilenet_v2_small": mobilenet_v2_small,
    "ds_cnn_kws": ds_cnn_kws,
    "conv1d_sensor": conv1d_sensor,
    "dense_autoencoder": dense_autoencoder,
    "concat_branches": concat_branches,
    "unsupported_middle": unsupported_middle,
    "matmul_transposed_weights": matmul_transposed_weights,
}
