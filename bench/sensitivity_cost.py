"""What the isolated sweep and the accumulated comparison cost, as ratios to one float pass.

    python bench/sensitivity_cost.py [--samples 64] [--repeats 3]

The sweep runs 1 + 2 x layers configurations per sample (qfit.measure.sensitivity: each a plain model
with its switches fixed, run only from its layer's first quantizer on, in sweep models of about
2000 nodes), so its natural unit is "float passes per configuration": 0.5 would mean each
configuration costs half a float pass, as running only the rest of the model from a layer on
averages. Session set-up is included (it grows with the layer count). The accumulated comparison
(qfit.measure.evaluate.evaluate: float pass + faithful int8 pass + error sums) is printed beside it.
Fastest of `repeats` runs each, interleaved; nothing asserts (shared machine).
"""
from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np
import onnxruntime as ort

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "tests"))

import zoo  # noqa: E402
from qfit import check as pipeline  # noqa: E402
from qfit.measure import sensitivity
from qfit.data import Batch  # noqa: E402
from qfit.graph.load import prepare_model  # noqa: E402
from qfit.quant.plan import PlanOptions, make_plan  # noqa: E402
from qfit.quant.quantize import build_qdq, calibrated_ranges  # noqa: E402
from qfit.runtime.sessions import batch_free  # noqa: E402


class InMemory:
    def __init__(self, name, xs, labels=None):
        self.name, self.xs, self.labels = name, xs, labels

    def __len__(self):
        return len(self.xs)

    def batches(self, size):
        for i in range(0, len(self.xs), size):
            yield Batch({self.name: self.xs[i:i + size]},
                        None if self.labels is None else self.labels[i:i + size],
                        [str(j) for j in range(i, min(i + size, len(self.xs)))])


def fastest(fn, repeats):
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - start)
    return best


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=int, default=64)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--batch", type=int, default=16)
    args = parser.parse_args(argv)
    for zm in (zoo.ds_cnn_kws(), zoo.mobilenet_v2_small()):
        loaded = prepare_model(zm.model)
        name = loaded.input_names[0]
        xs = np.random.default_rng(0).normal(0, 1, (args.samples, *loaded.shapes[name][1:])).astype(np.float32)
        data = InMemory(name, xs)
        plan = make_plan(loaded, PlanOptions())
        stats = pipeline.calibrate(loaded, plan, data, args.batch, progress=False)
        quantized = build_qdq(loaded, plan, calibrated_ranges(plan, stats, "percentile", 99.99))
        layers = pipeline.compared_layers(loaded, plan)
        session = ort.InferenceSession(batch_free(loaded.model).SerializeToString(), providers=["CPUExecutionProvider"])

        def float_pass():
            for batch in data.batches(args.batch):
                session.run(None, batch.inputs)

        floor = fastest(float_pass, args.repeats)
        compare = fastest(lambda: pipeline.evaluate(loaded, quantized, layers, data, args.batch, progress=False),
                          args.repeats)
        swept = {}

        def sweep():
            swept.update(sensitivity.sweep(loaded, plan, quantized, layers, data, args.batch, "score",
                                           sample_cap=args.samples))
        sweep_s = fastest(sweep, args.repeats)
        configurations = swept["runs_per_sample"]
        print(f"{zm.name}: {args.samples} samples, {len(layers)} layers, batch {args.batch}")
        print(f"  float pass {floor:.3f} s")
        print(f"  accumulated comparison / float pass: {compare / floor:.2f}x")
        print(f"  isolated sweep: {sweep_s:.2f} s for {configurations} configurations per sample = "
              f"{sweep_s / (configurations * floor):.2f} float passes per configuration "
              f"(samples used: {swept['samples_used']}, {swept['sweep_models']} sweep models)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
