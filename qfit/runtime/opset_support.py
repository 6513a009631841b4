"""opset_support: is the model's opset one this onnxruntime can run?

The onnx package may know opsets newer than the installed onnxruntime; such a model passes the ONNX
checker and then fails deep inside the first session. Probed once per opset with a one-node model,
since onnxruntime publishes no "newest opset" call.
"""
from __future__ import annotations

import functools

import onnx
import onnxruntime as ort
from onnx import TensorProto, helper

from qfit.errors import QfitError

OLDEST_PROBED_OPSET = 13


@functools.lru_cache(maxsize=None)
def runtime_runs_opset(opset: int) -> bool:
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, [1])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, [1])
    graph = helper.make_graph([helper.make_node("Relu", ["x"], ["y"])], "probe", [x], [y])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    model.ir_version = 8  # the oldest IR every supported onnxruntime reads
    so = ort.SessionOptions()
    so.log_severity_level = 4
    try:
        ort.InferenceSession(model.SerializeToString(), so, providers=["CPUExecutionProvider"])
        return True
    except Exception:
        return False


def newest_runtime_opset(below: int) -> int | None:
    for opset in range(below - 1, OLDEST_PROBED_OPSET - 1, -1):
        if runtime_runs_opset(opset):
            return opset
    return None


def check_runtime_opset(loaded, where: str | None = None):
    """Return `loaded` (a LoadedModel) unchanged, or refuse it when onnxruntime cannot run its opset."""
    model: onnx.ModelProto = loaded.model
    opset = next((imp.version for imp in model.opset_import if imp.domain in ("", "ai.onnx")), 0)
    if opset and not runtime_runs_opset(opset):
        newest = newest_runtime_opset(opset)
        hint = f"re-export at opset {newest} or older" if newest else "re-export at an older opset"
        raise QfitError(f"model: {where or loaded.path}: opset {opset} is newer than onnxruntime "
                        f"{ort.__version__} runs; {hint}")
    return loaded
