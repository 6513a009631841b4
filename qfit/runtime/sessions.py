"""sessions: onnxruntime sessions for the float model and for the QDQ model, batched.

Two arithmetic paths exist for a QDQ model in onnxruntime:
  * "fused": default optimizations fuse DQ -> Conv -> Q into an int8 kernel. On x86 without VNNI
    that kernel saturates 16-bit intermediate sums, so its outputs can differ by several steps from
    an MCU kernel that accumulates in 32 bits.
  * "faithful": QDQ fusion disabled (session config `session.disable_quant_qdq` = 1). Every
    DequantizeLinear produces exact int8 values times their scales and the layer runs in float32, which
    matches 32-bit integer accumulation up to float rounding (checked against an exact integer
    computation in tests/test_quantize.py). qfit's accuracy figures come from this path.
"""
from __future__ import annotations

import onnx
import onnxruntime as ort
import numpy as np
from onnx import TensorProto, helper
from onnxruntime.capi import onnxruntime_pybind11_state as _ort_state

# What onnxruntime raises when it cannot build or run a session (none of them derives from another).
ORT_ERRORS = (_ort_state.Fail, _ort_state.InvalidArgument, _ort_state.InvalidGraph, _ort_state.NotImplemented,
              _ort_state.RuntimeException)

FAITHFUL_PATH = ("onnxruntime CPU with QDQ fusion disabled (session.disable_quant_qdq=1): int8 values "
                 "dequantized exactly, products summed in float32, matching 32-bit integer accumulation")


MAX_THREADS = 256  # per session; thousands made onnxruntime deadlock or abort (the CLI refuses more)


def session_options(faithful: bool, threads: int = 0, memory_arena: bool = False) -> ort.SessionOptions:
    """onnxruntime options for one session; `threads` = intra-op threads (0 = onnxruntime's default)."""
    so = ort.SessionOptions()
    so.log_severity_level = 4  # the batch probe fails by design on fixed-batch graphs: keep it quiet
    # Without the memory arena a run's buffers go back when their arrays are dropped (onnxruntime hands
    # outputs to numpy without a copy). An arena keeps its session's largest working set for the
    # session's life, grown in powers of two: a pass exposing every tensor held about twice a batch's
    # tensors, and the integer path's one session per node held the model's activations once more
    # (the demo's calibration stage peaked 256 MiB above its start with arenas, 132 MiB without; the
    # check's time did not change).
    so.enable_cpu_mem_arena = memory_arena
    # Workers that busy-wait between operators take the cores from the numpy thread that bins or
    # sums the previous batch meanwhile (qfit.quant.observe, qfit.measure.evaluate), and from anything
    # else running on a laptop; they sleep instead.
    so.add_session_config_entry("session.intra_op.allow_spinning", "0")
    if threads and threads > 0:
        so.intra_op_num_threads = min(int(threads), MAX_THREADS)
        so.inter_op_num_threads = 1
    if faithful:
        so.add_session_config_entry("session.disable_quant_qdq", "1")
    return so


def with_outputs(model: onnx.ModelProto, names: list[str], elem_types: dict[str, int] | None = None) -> onnx.ModelProto:
    """A copy of `model` that also returns the intermediate tensors `names`."""
    copy = onnx.ModelProto()
    copy.CopyFrom(model)
    present = {o.name for o in copy.graph.output}
    for name in names:
        if name not in present:
            elem = (elem_types or {}).get(name, TensorProto.FLOAT)
            copy.graph.output.append(helper.make_tensor_value_info(name, elem, None))
            present.add(name)
    return copy


def batch_free(model: onnx.ModelProto) -> onnx.ModelProto:
    """A copy whose inputs and outputs have a free leading dimension, for batched runs."""
    copy = onnx.ModelProto()
    copy.CopyFrom(model)
    del copy.graph.value_info[:]
    for vi in list(copy.graph.input) + list(copy.graph.output):
        dims = vi.type.tensor_type.shape.dim
        if len(dims):
            dims[0].ClearField("dim_value")
            dims[0].dim_param = "batch"
    return copy


class Runner:
    """A reusable session over `model` returning `outputs` (names) for a dict of input arrays.

    Batches larger than 1 run through a batch-free copy of the model when that copy produces the
    right shapes (a model that hard-codes its batch in a Reshape does not); otherwise sample by sample.
    """

    def __init__(self, model: onnx.ModelProto, outputs: list[str], faithful: bool = False,
                 batch_size: int = 16, threads: int = 0):
        self.outputs = list(outputs)
        self.faithful = faithful
        self.threads = threads
        self._extended = with_outputs(model, self.outputs)
        self._session = None
        self.batched = None
        if batch_size > 1:
            try:
                candidate = ort.InferenceSession(batch_free(self._extended).SerializeToString(),
                                                 session_options(faithful, threads),
                                                 providers=["CPUExecutionProvider"])
                if self._batch_works(candidate):
                    self.batched = candidate
            except ORT_ERRORS:  # onnxruntime rejects the batch-free copy: run sample by sample
                self.batched = None
        if self.batched is None:
            self._session = self._fixed_session()

    def _fixed_session(self) -> ort.InferenceSession:
        return ort.InferenceSession(self._extended.SerializeToString(), session_options(self.faithful, self.threads),
                                    providers=["CPUExecutionProvider"])

    @property
    def session(self) -> ort.InferenceSession:
        """The session over the model as given (batch 1). Built on first use: when batches run through
        the batch-free copy, a run of one sample may never come (building a session costs as much as
        tens of runs of a small model)."""
        if self._session is None:
            self._session = self._fixed_session()
        return self._session

    def _batch_works(self, session: ort.InferenceSession) -> bool:
        # Batch 2 must give batch-2 outputs with the per-sample shapes of batch 1 (a model that
        # hard-codes its batch in a Reshape does not). The model's own input shapes give the
        # per-sample shapes, so the fixed-shape session is not needed for this check.
        feeds = {}
        constants = {i.name for i in self._extended.graph.initializer}
        for inp in self._extended.graph.input:
            if inp.name in constants:
                continue
            dims = inp.type.tensor_type.shape.dim
            shape = [d.dim_value if d.HasField("dim_value") else 1 for d in dims]
            feeds[inp.name] = np.zeros([2] + shape[1:], np.float32)
        try:
            got = session.run(self.outputs, feeds)
            single = session.run(self.outputs, {k: v[:1] for k, v in feeds.items()})
        except ORT_ERRORS:  # any failure of the probe means: do not batch
            return False
        return all(g.shape[:1] == (2,) and g.shape[1:] == s.shape[1:] and s.shape[:1] == (1,)
                   for g, s in zip(got, single))

    def __call__(self, inputs: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        n = next(iter(inputs.values())).shape[0]
        if n == 1 or self.batched is not None:
            session = self.session if n == 1 else self.batched
            values = session.run(self.outputs, inputs)
            return dict(zip(self.outputs, values))
        parts = [self.session.run(self.outputs, {k: v[i:i + 1] for k, v in inputs.items()}) for i in range(n)]
        return {name: np.concatenate([p[j] for p in parts], axis=0) for j, name in enumerate(self.outputs)}
