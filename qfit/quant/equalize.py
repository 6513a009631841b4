"""equalize: two published post-training improvements, each optional and each measured before/after.

Both come from Nagel, van Baalen, Blankevoort, Welling, "Data-Free Quantization Through Weight
Equalization and Bias Correction", ICCV 2019.

Cross-layer equalization (CLE, paper section 4.1). For two layers y = W2 f(W1 x + b1) + b2 whose
activation f is positively homogeneous (ReLU: f(x / s) = f(x) / s for s > 0), dividing output channel
i of layer 1 by s_i and multiplying input channel i of layer 2 by s_i leaves the function unchanged.
With r1_i, r2_i the ranges (max |w|) of those two weight slices, s_i = sqrt(r1_i / r2_i) makes both
equal to sqrt(r1_i r2_i), so per-tensor weight quantization no longer wastes its levels on a few wide
channels (the failure the paper shows for MobileNetV2's depthwise convolutions). Pairs in a chain
(Conv -> DWConv -> Conv) share a layer, so the pairs are swept repeatedly until the scales settle.

ReLU6 (Clip(x, 0, 6)) is not positively homogeneous: the paper replaces it by ReLU, which changes the
float model. qfit keeps the user's float function instead, with a constraint measured on the
calibration data: a channel whose pre-activation reaches the clip is not scaled, and a channel that
stays below it (max M_i) is scaled only while M_i / S_i stays below the clip too. On every calibration
sample the clip then never engages where a scale was applied, so the function is unchanged there.

Bias absorption (section 4.1.2). After equalization some channels of h = ReLU(W1 x + b1) carry a large
positive offset that widens the per-tensor activation range. Where a channel's pre-activation never
falls below c_i > 0 on the calibration data, h_i = (h_i - c_i) + c_i, so c_i moves out of layer 1's bias
and into layer 2's (b2 += W2 c). The paper bounds c_i with batch-norm statistics (beta - 3 gamma); BN is
folded here, so qfit uses the exact per-channel minimum seen on the calibration data. Moving a
constant through layer 2 is exact only when layer 2 has no zero padding (padding would see 0, not
c_i), so absorption is limited to such layers (1x1 convolutions, unpadded convolutions, Gemm).

Empirical bias correction (section 4.2). Weight rounding shifts the expected output of a layer:
E[W' x] - E[W x] = (W' - W) E[x]. The mean of each layer's int8 input is measured on the calibration
data with the int8 model (so upstream quantization is included), the shift per output channel is
(W' - W) applied to that mean (a convolution of the mean input map, so padding is accounted for
exactly), and it is subtracted from the layer's bias. A layer kept float gets no correction.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import onnx
import onnxruntime as ort

from qfit import ops
from qfit.graph.model import FreshNames, LoadedModel, with_constants
from qfit.quant.plan import Plan
from qfit.quant.quantize import QuantizedModel, quantize_weight
from qfit.runtime.sessions import Runner

SCALE_TOLERANCE = 1e-6   # stop sweeping when no scale moves by more than this (relative)
MAX_SWEEPS = 200


def _fresh_names(loaded: LoadedModel) -> FreshNames:
    """Names for new bias initializers, clear of every tensor of `loaded`."""
    return FreshNames(set(loaded.constants) | set(loaded.shapes))


# ---- the weight layout every equalized layer is handled in -----------------------------------------
# (out, in_per_group, k...) as for Conv; the registry's Equalization record converts (a Gemm's B to (N, K)).

def _rule(node: onnx.NodeProto) -> ops.Equalization:
    return ops.of(node).equalization


def _as_out_in(node: onnx.NodeProto, w: np.ndarray) -> np.ndarray:
    return _rule(node).to_out_in(node, w)


def _groups(node: onnx.NodeProto) -> int:
    return _rule(node).groups(node)


def _input_slices(node: onnx.NodeProto, w: np.ndarray, channels: int) -> list[tuple[slice, int]]:
    """For each input channel i of `node`: (rows of the weight that read it, column within the group)."""
    groups = _groups(node)
    per_group_in = w.shape[1]
    per_group_out = w.shape[0] // groups
    return [(slice((i // per_group_in) * per_group_out, (i // per_group_in + 1) * per_group_out),
             i % per_group_in) for i in range(channels)]


# ---- pairs ----------------------------------------------------------------------------------------

@dataclass
class Pair:
    """Two layers with only a positively homogeneous activation (or nothing) between them."""

    first: str
    second: str
    activation: str              # "relu", "relu6"/"clip" (capped), or "none"
    pre_activation: str          # the first layer's output tensor
    channels: int
    cap: float | None = None     # the activation's upper clip, when it has one


def find_pairs(loaded: LoadedModel) -> list[Pair]:
    """Conv/Gemm -> [ReLU | ReLU6 | Clip(0, c)] -> Conv/Gemm chains whose weights can be rescaled."""
    graph = loaded.graph
    index = loaded.index
    sole_consumer = index.sole_consumer

    def rescalable(node: onnx.NodeProto) -> bool:
        if ops.of(node).equalization is None or len(node.input) < 2:
            return False
        w = loaded.constant(node.input[1])
        if w is None or w.dtype != np.float32 or index.use_count(node.input[1]) != 1:
            return False
        if not _rule(node).rescalable(node, w):
            return False
        if len(node.input) > 2 and node.input[2]:
            b = loaded.constant(node.input[2])
            if b is None or b.ndim != 1 or index.use_count(node.input[2]) != 1:
                return False
        return True

    pairs = []
    for first in graph.node:
        if not rescalable(first) or not first.output:
            continue
        pre = first.output[0]
        nxt = sole_consumer(pre)
        if nxt is None:
            continue
        activation, cap, link = "none", None, pre
        bounds = ops.clamp_bounds(nxt, loaded.constant)
        if bounds is not None:
            # positively homogeneous only with a lower bound of exactly 0 (a ReLU, capped or not)
            lo, hi = bounds
            if lo is None or lo != 0.0:
                continue
            activation, cap, link = ("relu", None, nxt.output[0]) if hi is None else (
                "relu6" if hi == 6.0 else "clip", hi, nxt.output[0])
        elif ops.of(nxt).clamp_bounds is not None:
            continue   # a clamp whose bounds are not constants
        if link != pre:
            nxt = sole_consumer(link)
            if nxt is None:
                continue
        second = nxt
        if not rescalable(second) or second.input[0] != link:
            continue
        w1 = _as_out_in(first, loaded.constants[first.input[1]])
        w2 = _as_out_in(second, loaded.constants[second.input[1]])
        channels = w1.shape[0]
        if first.op_type != second.op_type or w2.shape[1] * _groups(second) != channels:
            continue
        pairs.append(Pair(first.name, second.name, activation, pre, channels, cap))
    return pairs


def channel_extremes(loaded: LoadedModel, tensors: list[str], data, batch_size: int
                     ) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Per-channel (axis 1) min and max of `tensors` over `data` (one streaming float pass)."""
    if not tensors:
        return {}
    runner = Runner(loaded.model, tensors, batch_size=batch_size)
    lo: dict[str, np.ndarray] = {}
    hi: dict[str, np.ndarray] = {}
    for batch in data.batches(batch_size):
        values = runner(batch.inputs)
        for name in tensors:
            v = np.asarray(values[name])
            axes = tuple(a for a in range(v.ndim) if a != 1)
            vmin, vmax = v.min(axis=axes).astype(np.float64), v.max(axis=axes).astype(np.float64)
            lo[name] = vmin if name not in lo else np.minimum(lo[name], vmin)
            hi[name] = vmax if name not in hi else np.maximum(hi[name], vmax)
    return {name: (lo[name], hi[name]) for name in tensors if name in lo}


def _channel_range_spread(w_out_in: np.ndarray) -> float:
    """max over channels / min over channels of max |w|: what per-tensor quantization suffers from."""
    r = np.abs(w_out_in.reshape(w_out_in.shape[0], -1)).max(axis=1)
    r = r[r > 0]
    return float(r.max() / r.min()) if r.size else 1.0


@dataclass
class EqualizationResult:
    loaded: LoadedModel
    pairs: list[dict] = field(default_factory=list)
    sweeps: int = 0
    absorbed_channels: int = 0
    skipped: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        return {"pairs": self.pairs, "pairs_equalized": len(self.pairs), "sweeps": self.sweeps,
                "absorbed_channels": self.absorbed_channels, "skipped": self.skipped}


def equalize(loaded: LoadedModel, data=None, batch_size: int = 16, absorb: bool = True) -> EqualizationResult:
    """Cross-layer equalization and bias absorption (see the module docstring).

    `data` (batches of calibration inputs) is needed for pairs through a clip (ReLU6) and for bias
    absorption; without it only ReLU and linear pairs are equalized and nothing is absorbed.
    """
    pairs = find_pairs(loaded)
    result = EqualizationResult(loaded=loaded)
    if not pairs:
        return result
    nodes = {n.name: n for n in loaded.graph.node}
    needs_data = [p.pre_activation for p in pairs if p.cap is not None or (absorb and p.activation != "none")]
    extremes = channel_extremes(loaded, sorted(set(needs_data)), data, batch_size) if data is not None else {}
    kept = []
    for p in pairs:
        if p.cap is not None and p.pre_activation not in extremes:
            result.skipped.append(f"{p.first} -> {p.second}: {p.activation} between them and no calibration "
                                  f"data to check where the clip engages")
        else:
            kept.append(p)
    pairs = kept

    weights, biases = _layer_arrays(loaded, nodes, pairs)
    spread_before = {p.first: _channel_range_spread(weights[p.first]) for p in pairs}
    lower, upper = _scale_bounds(pairs, extremes)
    cumulative, result.sweeps = _sweep(pairs, nodes, weights, biases, lower, upper)
    absorbed = _absorb(pairs, nodes, weights, biases, extremes, cumulative) if absorb else 0
    result.absorbed_channels = absorbed

    values: dict[str, np.ndarray] = {}
    new_biases: dict[str, tuple[str, np.ndarray]] = {}
    fresh = _fresh_names(loaded)
    for name, w in weights.items():
        node = nodes[name]
        values[node.input[1]] = _rule(node).from_out_in(node, w).astype(np.float32)
        if len(node.input) > 2 and node.input[2]:
            values[node.input[2]] = biases[name].astype(np.float32)
        elif np.any(biases[name] != 0):
            new_biases[name] = (fresh(f"{name}_bias_equalized"), biases[name].astype(np.float32))
    result.loaded = with_constants(loaded, values, new_biases)
    result.loaded.notes.append(f"cross-layer equalization: {len(pairs)} layer pairs rescaled"
                               + (f", {absorbed} channel offsets absorbed" if absorbed else ""))
    result.pairs = [{"first": p.first, "second": p.second, "activation": p.activation, "channels": p.channels,
                     "range_spread_before": round(spread_before[p.first], 3),
                     "range_spread_after": round(_channel_range_spread(weights[p.first]), 3),
                     "channels_fixed_by_clip": int(np.sum(upper[k] == 1.0)) if p.cap is not None else 0}
                    for k, p in enumerate(pairs)]
    return result


def _layer_arrays(loaded: LoadedModel, nodes: dict, pairs: list[Pair]) -> tuple[dict, dict]:
    """Weights (out, in, k...) and biases (zeros where a layer has none) of every paired layer, float64."""
    weights: dict[str, np.ndarray] = {}
    biases: dict[str, np.ndarray] = {}
    for name in {p.first for p in pairs} | {p.second for p in pairs}:
        node = nodes[name]
        weights[name] = _as_out_in(node, loaded.constants[node.input[1]]).astype(np.float64)
        channels = weights[name].shape[0]
        has_bias = len(node.input) > 2 and node.input[2]
        biases[name] = (loaded.constants[node.input[2]].astype(np.float64) if has_bias
                        else np.zeros(channels, np.float64))
    return weights, biases


def _scale_bounds(pairs: list[Pair], extremes: dict) -> tuple[dict, dict]:
    """Bounds on the cumulative scale S_i of each pair's channels (1 = untouched)."""
    lower, upper = {}, {}
    for k, p in enumerate(pairs):
        lower[k] = np.zeros(p.channels)
        upper[k] = np.full(p.channels, np.inf)
        if p.cap is not None:
            _, top = extremes[p.pre_activation]
            engaged = top > p.cap
            # the clip must stay out of reach on the data: M_i / S_i <= cap
            lower[k] = np.where(engaged, 1.0, np.maximum(top, 0.0) / p.cap)
            upper[k] = np.where(engaged, 1.0, np.inf)
    return lower, upper


def _sweep(pairs: list[Pair], nodes: dict, weights: dict, biases: dict, lower: dict, upper: dict
           ) -> tuple[dict, int]:
    """Rescale every pair towards equal ranges, repeatedly, until no scale moves (in place).
    Returns the cumulative scale per pair and the number of sweeps."""
    cumulative = {k: np.ones(p.channels) for k, p in enumerate(pairs)}
    sweeps = 0
    for sweeps in range(1, MAX_SWEEPS + 1):
        moved = 0.0
        for k, p in enumerate(pairs):
            w1, w2 = weights[p.first], weights[p.second]
            r1 = np.abs(w1.reshape(p.channels, -1)).max(axis=1)
            slices = _input_slices(nodes[p.second], w2, p.channels)
            r2 = np.array([np.abs(w2[rows, col]).max() for rows, col in slices])
            s = np.ones(p.channels)
            ok = (r1 > 0) & (r2 > 0)
            s[ok] = np.sqrt(r1[ok] / r2[ok])
            target = np.clip(cumulative[k] * s, lower[k], upper[k])
            s = np.where(target > 0, target / cumulative[k], 1.0)
            cumulative[k] *= s
            shape = (-1,) + (1,) * (w1.ndim - 1)
            w1 /= s.reshape(shape)
            biases[p.first] /= s
            for (rows, col), si in zip(slices, s):
                w2[rows, col] *= si
            moved = max(moved, float(np.max(np.abs(np.log(s)))) if s.size else 0.0)
        if moved < SCALE_TOLERANCE:
            break
    return cumulative, sweeps


def _absorb(pairs: list[Pair], nodes: dict, weights: dict, biases: dict, extremes: dict, cumulative: dict) -> int:
    """Move each channel's guaranteed offset c_i from layer 1's bias into layer 2's (in place).
    Returns the number of channels absorbed."""
    absorbed = 0
    for k, p in enumerate(pairs):
        if p.activation == "none" or p.pre_activation not in extremes:
            continue
        second = nodes[p.second]
        if not _rule(second).unpadded(second):
            continue
        if ops.bias_scale(second) == 0.0:
            continue
        bottom, top = extremes[p.pre_activation]
        bottom, top = bottom / cumulative[k], top / cumulative[k]
        c = np.maximum(bottom, 0.0)
        if p.cap is not None:
            c = np.where(top <= p.cap, c, 0.0)  # a channel that reaches the clip keeps its offset
        if not np.any(c > 0):
            continue
        w2 = weights[p.second]
        alpha, beta = ops.product_scale(second), ops.bias_scale(second)
        shift = np.zeros(w2.shape[0])
        for (rows, col), ci in zip(_input_slices(second, w2, p.channels), c):
            if ci > 0:
                shift[rows] += w2[rows, col].reshape(w2[rows, col].shape[0], -1).sum(axis=1) * ci
        biases[p.first] -= c
        biases[p.second] += shift * alpha / beta
        absorbed += int(np.sum(c > 0))
    return absorbed


# ---- empirical bias correction ---------------------------------------------------------------------

@dataclass
class BiasFix:
    """The corrected bias of one layer."""

    node: str
    bias: str                  # initializer name holding the bias (new when the layer had none)
    added: bool                # the layer had no bias input (or shared one): a new initializer
    original: np.ndarray       # bias before correction (zeros when added)
    corrected: np.ndarray
    shift: np.ndarray          # (W' - W) E[x] per output channel: what was subtracted


@dataclass
class BiasCorrection:
    fixes: dict[str, BiasFix] = field(default_factory=dict)
    samples: int = 0

    def structure(self, loaded: LoadedModel) -> LoadedModel:
        """`loaded` with a (still uncorrected) bias input on every corrected layer, so that a plan made
        from it has an int32 bias wherever a correction may go."""
        added = {f.node: (f.bias, f.original) for f in self.fixes.values() if f.added}
        return with_constants(loaded, None, added) if added else loaded

    def values_for(self, plan: Plan) -> dict[str, np.ndarray]:
        """Corrected bias values for the layers `plan` quantizes (a float layer keeps its own bias)."""
        return {f.bias: f.corrected for f in self.fixes.values() if f.node not in plan.float_nodes}

    def to_dict(self) -> dict:
        shifts = [float(np.max(np.abs(f.shift))) for f in self.fixes.values()]
        return {"layers_corrected": len(self.fixes), "samples": self.samples,
                "largest_shift": round(max(shifts), 6) if shifts else 0.0,
                "layers": [{"layer": f.node, "max_abs_shift": round(float(np.max(np.abs(f.shift))), 6),
                            "mean_abs_shift": round(float(np.mean(np.abs(f.shift))), 6)}
                           for f in self.fixes.values()]}


def _evaluate(model: onnx.ModelProto, feeds: dict[str, np.ndarray]) -> list[np.ndarray]:
    """Run a small float model once on the CPU (the registry's mean-shift hooks build it)."""
    so = ort.SessionOptions()
    so.log_severity_level = 3
    session = ort.InferenceSession(model.SerializeToString(), so, providers=["CPUExecutionProvider"])
    return session.run(None, feeds)


def bias_correction(loaded: LoadedModel, plan: Plan, quantized: QuantizedModel, data, batch_size: int = 16
                    ) -> BiasCorrection:
    """Per-layer bias shifts from the int8 model's own inputs on `data` (see the module docstring)."""
    graph = loaded.graph
    index = loaded.index
    targets = []
    for node in graph.node:
        if ops.of(node).equalization is None or node.name in plan.float_nodes:
            continue
        if (node.name, 1) not in plan.weights or node.input[0] not in plan.activations:
            continue
        if not _rule(node).rescalable(node, loaded.constants[node.input[1]]) or ops.bias_scale(node) == 0.0:
            continue
        targets.append(node)
    result = BiasCorrection()
    if not targets:
        return result
    names = list(dict.fromkeys(quantized.dequantized[n.input[0]] for n in targets))
    runner = Runner(quantized.model, names, faithful=True, batch_size=batch_size)
    sums: dict[str, np.ndarray] = {}
    count = 0
    for batch in data.batches(batch_size):
        values = runner(batch.inputs)
        for name in names:
            s = np.asarray(values[name], np.float64).sum(axis=0)
            sums[name] = s if name not in sums else sums[name] + s
        count += next(iter(batch.inputs.values())).shape[0]
    result.samples = count
    if count == 0:
        return result
    fresh = _fresh_names(loaded)
    for node in targets:
        mean_input = sums[quantized.dequantized[node.input[0]]] / count
        wq = plan.weights[(node.name, 1)]
        w = loaded.constants[node.input[1]]
        q, scale = quantize_weight(w, wq.axis, wq.bits)
        shape = [1] * w.ndim
        if wq.axis is not None:
            shape[wq.axis] = -1
        error = q.astype(np.float64) * np.asarray(scale, np.float64).reshape(shape) - w.astype(np.float64)
        shift = _rule(node).mean_shift(node, mean_input, error, _evaluate)
        has_bias = len(node.input) > 2 and node.input[2] and index.use_count(node.input[2]) == 1
        if has_bias:
            bias_name, original, added = node.input[2], loaded.constants[node.input[2]].astype(np.float64), False
        else:
            shared = len(node.input) > 2 and node.input[2]
            original = (loaded.constants[node.input[2]].astype(np.float64) if shared
                        else np.zeros(shift.shape[0], np.float64))
            bias_name, added = fresh(f"{node.name}_bias_corrected"), True
        corrected = (original - shift).astype(np.float32)
        result.fixes[node.name] = BiasFix(node.name, bias_name, added, original.astype(np.float32),
                                          corrected, shift)
    return result
