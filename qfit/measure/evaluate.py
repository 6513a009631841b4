"""evaluate: the float model and a QDQ model over the same data -> end metrics and per-layer errors.

`compared_layers` lists the rows of the per-layer table (which tensor each layer's error is measured
on); `evaluate` runs both models over the evaluation data once and fills the error sums of every row
and the end metrics (qfit.measure.compare); `end_metrics_only` is the same without per-layer tensors.
Every int8 figure comes from the selected arithmetic: the integer path (qfit.measure.integer, the default)
or the float preview (the faithful onnxruntime path, qfit.runtime.sessions.FAITHFUL_PATH).
"""
from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np
from tqdm import tqdm

from qfit.data import DataFolder
from qfit.graph.load import LoadedModel
from qfit.measure import integer
from qfit.measure.compare import EndMetrics, ErrorSums
from qfit.quant.plan import Plan
from qfit.quant.quantize import QuantizedModel
from qfit.runtime.sessions import Runner

END_METRIC_KEYS = ("metric", "float", "int8", "drop_pt", "drop_ci95_pt", "agreement_pct", "output_sqnr_db",
                   "decision_flips_pct")


def progress_bar(total: int | None, desc: str, enabled: bool, unit: str = "sample"):
    return tqdm(total=total, desc=desc, unit=unit, disable=not enabled, leave=False)


def output_kind(loaded: LoadedModel) -> str:
    """'classification' when the first output is (N, K) with K > 1, else 'score'."""
    shape = loaded.shapes.get(loaded.output_names[0], ())
    return "classification" if len(shape) == 2 and shape[1] > 1 else "score"


def sample_of(data: DataFolder, limit: int | None, seed: int) -> DataFolder:
    """At most `limit` samples of an opened folder (DataFolder.sample)."""
    return data.sample(limit, seed)


def compared_layers(loaded: LoadedModel, plan: Plan) -> list[dict]:
    """The rows of the per-layer table: one per node, with the tensor its error is measured on.

    A ReLU that absorbs its producer's output is not a row of its own: the producer's row measures
    the tensor after the clamp, as an int8 kernel stores it.
    """
    rows = []
    absorbed = set(plan.fused.values())
    for node in loaded.graph.node:
        # the first output present (an LSTM may leave its sequence output Y unused, "")
        out = next((o for o in node.output if o), None)
        if out is None or out in absorbed:
            continue
        tensor = plan.fused.get(out, out)
        if tensor not in loaded.shapes:
            continue
        rows.append({"name": node.name, "op_type": node.op_type, "tensor": tensor,
                     "precision": "float" if node.name in plan.float_nodes else
                     ("int16" if plan.bits_of(tensor) == 16 else "int8")})
    return rows


# Bytes of the float32 tensors one evaluation batch exposes (every compared layer's). Two batches are
# alive at once (one summed while the next runs) with their int8 twins and temporaries, so the
# evaluation's memory is a few times this, whatever the model's size and the number of samples.
EVALUATION_BATCH_BYTES = 16 << 20


def evaluation_batch(loaded: LoadedModel, tensors: list[str], batch_size: int,
                     batch_bytes: int = EVALUATION_BATCH_BYTES) -> int:
    """`batch_size`, or fewer samples where the batch's float32 `tensors` would exceed `batch_bytes`."""
    sample_bytes = sum(int(np.prod(loaded.shapes[t][1:], dtype=np.int64)) * 4
                       for t in tensors if len(loaded.shapes.get(t, ())) > 1)
    return max(1, min(batch_size, batch_bytes // sample_bytes)) if sample_bytes else batch_size


def evaluate(loaded: LoadedModel, quantized: QuantizedModel, layers: list[dict], data: DataFolder,
             batch_size: int, threshold: float | None = None, progress: bool = True,
             threads: int = 0, arithmetic: str = "integer", rounding: str = "double",
             compare_preview: bool = True, batch_bytes: int = EVALUATION_BATCH_BYTES
             ) -> tuple[dict, dict[str, ErrorSums]]:
    """Float and int8 passes over `data`: end metrics and accumulated per-layer errors. The int8 pass
    runs in the selected arithmetic (qfit.measure.integer: the integer path, or the float preview);
    the end metrics carry the report's "arithmetic" section under the key "arithmetic" (with the
    integer path, `compare_preview` also runs the float preview to count changed predictions).
    Batches hold `batch_size` samples, fewer where their compared tensors exceed `batch_bytes`."""
    output = loaded.output_names[0]
    tensors = list(dict.fromkeys([row["tensor"] for row in layers] + [output]))
    int8_names = [quantized.dequantized.get(t, t) for t in tensors]
    batch_size = evaluation_batch(loaded, tensors, batch_size, batch_bytes)
    int8_output = quantized.dequantized.get(output, output)
    float_runner = Runner(loaded.model, tensors, batch_size=batch_size, threads=threads)
    int8_runner = integer.quantized_runner(quantized.model, int8_names, arithmetic, rounding, batch_size, threads)
    sums = {t: ErrorSums() for t in tensors}
    metrics = EndMetrics(output_kind(loaded), threshold)
    preview = integer.PreviewComparison(quantized.model, int8_output, arithmetic if compare_preview else "float",
                                        output_kind(loaded) == "classification", batch_size, threads)
    input_name = loaded.input_names[0]
    reconstruction = loaded.shapes.get(output) == loaded.shapes.get(input_name)

    def absorb(batch, reference: dict, got) -> None:
        # `got` may hold the integer path's int8 tensors, dequantized on each read: each is read once
        int8_out = got[int8_output]
        preview.update(batch.inputs, int8_out)   # on the worker: beside the next batch's passes
        for t, q in zip(tensors, int8_names):
            sums[t].update(reference[t], int8_out if q == int8_output else got[q])
        score_inputs = None
        if reconstruction and threshold is not None:
            x = batch.inputs[input_name]
            n = x.shape[0]
            score_inputs = (((reference[output] - x) ** 2).reshape(n, -1).mean(1),
                            ((int8_out - x) ** 2).reshape(n, -1).mean(1))
        metrics.update(reference[output], int8_out, batch.labels, score_inputs)

    # As in qfit.quant.observe: one worker sums batch k while onnxruntime runs batch k+1; batches are
    # absorbed in order, one at a time, so the sums are those of a plain loop.
    with progress_bar(len(data), "evaluating", progress) as bar, \
            ThreadPoolExecutor(max_workers=1, thread_name_prefix="qfit-evaluate") as worker:
        pending = None
        for batch in data.batches(batch_size):
            reference = float_runner(batch.inputs)
            got = int8_runner(batch.inputs)
            if pending is not None:
                pending.result()
            pending = worker.submit(absorb, batch, reference, got)
            bar.update(len(batch.files))
        if pending is not None:
            pending.result()
    result = metrics.result()
    result["arithmetic"] = integer.arithmetic_section(arithmetic, rounding, int8_runner, preview)
    return result, sums


def end_metrics_only(reference: LoadedModel, quantized: QuantizedModel, data: DataFolder, batch_size: int,
                     threshold: float | None = None, progress: bool = True, threads: int = 0,
                     arithmetic: str = "integer", rounding: str = "double") -> dict:
    """Drop, int8 figure and output SQNR of one QDQ model (no per-layer tensors)."""
    accuracy, _ = evaluate(reference, quantized, [], data, batch_size, threshold, progress, threads,
                           arithmetic, rounding, compare_preview=False)
    return {k: accuracy[k] for k in END_METRIC_KEYS if k in accuracy}


def weight_bytes_by_node(loaded: LoadedModel, plan: Plan) -> dict[str, int]:
    totals: dict[str, int] = {}
    for (node, _), wq in plan.weights.items():
        totals[node] = totals.get(node, 0) + int(loaded.constants[wq.tensor].size) * wq.bits // 8
    return totals


def fill_layer_rows(loaded: LoadedModel, plan: Plan, layers: list[dict], sums: dict[str, ErrorSums]) -> None:
    """Each layer row's int8 weight bytes and accumulated error figures."""
    weight_bytes = weight_bytes_by_node(loaded, plan)
    for row in layers:
        row["weight_bytes_int8"] = weight_bytes.get(row["name"], 0)
        row.update(sums[row["tensor"]].to_dict())
