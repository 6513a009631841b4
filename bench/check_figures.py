"""Issue 15's figures: `qfit check` as a user runs it, whole process, against a bare float pass over the
same files, and whether the layer ranking informs (its agreement between two halves of the data).

Called by bench/run.py (group "check"); bench/README.md says what each figure times. Every time here
is a whole child process (Python start-up and imports included on both sides), so a ratio compares
what a user waits for; peak RSS is the child's (getrusage of a wrapper that runs only that child).
"""
from __future__ import annotations

import copy
import json
import os
import subprocess
import sys

import onnx

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DEMO = os.path.join(REPO, "calib_demo")

# Runs argv as its only child: wall seconds, that child's peak RSS (KiB) and its exit code.
MEASURED_CHILD = r"""
import resource, subprocess, sys, time
start = time.perf_counter()
done = subprocess.run(sys.argv[1:], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
seconds = time.perf_counter() - start
print(seconds, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss, done.returncode)
sys.stderr.write(done.stderr[-3000:] if done.returncode not in (0, 1) else "")
"""

# The floor: decode each file as qfit does (Pillow + the preprocessing, or .npy), one onnxruntime
# session at its default settings over the float model, batches of 16. Nothing else.
FLOAT_PASS_CHILD = r"""
import sys
sys.path.insert(0, {repo!r})
import onnx, onnxruntime as ort
from qfit.data import DataFolder, load_preprocess
from qfit.runtime.sessions import batch_free
model = onnx.load({model!r})
shapes = {{i.name: tuple(d.dim_value for d in i.type.tensor_type.shape.dim) for i in model.graph.input}}
preprocess = load_preprocess({preprocess!r}) if {preprocess!r} else None
session = ort.InferenceSession(batch_free(model).SerializeToString(), providers=["CPUExecutionProvider"])
for folder, limit in {folders!r}:
    for batch in DataFolder(folder, shapes, preprocess=preprocess, limit=limit).batches(16):
        session.run(None, batch.inputs)
"""


def measured(argv: list[str]) -> tuple[float, int]:
    """(wall seconds, peak RSS bytes) of one child process running argv; exit 0 or 1 (a verdict)."""
    done = subprocess.run([sys.executable, "-c", MEASURED_CHILD, *argv], capture_output=True, text=True, check=True)
    seconds, peak_kib, code = done.stdout.split()
    if int(code) not in (0, 1):
        raise RuntimeError(f"{' '.join(argv[:4])} ... exited {code}: {done.stderr}")
    return float(seconds), int(peak_kib) * 1024


def float_pass(model: str, folders: list[tuple[str, int | None]], preprocess: str | None = None) -> tuple[float, int]:
    code = FLOAT_PASS_CHILD.format(repo=REPO, model=model, preprocess=preprocess or "", folders=folders)
    return measured([sys.executable, "-c", code])


def qfit_check(model: str, calib: str, evaluation: str, out: str, *extra: str) -> tuple[float, int]:
    return measured([sys.executable, "-m", "qfit.cli", "check", model, "--calib", calib, "--eval", evaluation,
                     "--out", out, "--quiet", *extra])


def mib(n_bytes: float) -> str:
    return f"{n_bytes / 2**20:.0f} MiB"


# ---- the demo, as README runs it -----------------------------------------------------------------

def demo_check_figures(sizes: dict, work: str, Figure) -> list:
    """Demo check with and without the layer sweep, against a bare float pass over the same files;
    passes interleaved, fastest of `repeats` kept (the peak RSS is the largest seen)."""
    limits = sizes["check_demo_limits"]          # (calibration, evaluation) files; None = all
    extra = ["--preprocess", os.path.join(DEMO, "preprocess.json"), "--flash", "1MiB", "--sram", "256KiB"]
    extra += [a for flag, n in zip(("--limit", "--eval-limit"), limits) if n for a in (flag, str(n))]
    folders = [(os.path.join(DEMO, "calib"), limits[0]), (os.path.join(DEMO, "eval"), limits[1])]
    runs = {"floor": [], "check": [], "sweep_off": []}
    peaks = {key: 0 for key in runs}
    for _ in range(sizes["check_repeats"]):
        for key, run in (("floor", lambda: float_pass(os.path.join(DEMO, "model.onnx"), folders,
                                                      os.path.join(DEMO, "preprocess.json"))),
                         ("check", lambda: qfit_check(os.path.join(DEMO, "model.onnx"), *(f for f, _ in folders),
                                                      os.path.join(work, "demo_check"), *extra)),
                         ("sweep_off", lambda: qfit_check(os.path.join(DEMO, "model.onnx"), *(f for f, _ in folders),
                                                          os.path.join(work, "demo_check0"), *extra,
                                                          "--isolated-samples", "0"))):
            seconds, peak = run()
            runs[key].append(seconds)
            peaks[key] = max(peaks[key], peak)
    best = {key: min(values) for key, values in runs.items()}
    with open(os.path.join(work, "demo_check", "report.json")) as f:
        section = json.load(f)["sensitivity"]
    files = sum(len(image_files(folder)) if limit is None else min(limit, len(image_files(folder)))
                for folder, limit in folders)
    whole, off = best["check"] / best["floor"], best["sweep_off"] / best["floor"]
    sweep = max(0.0, best["check"] - best["sweep_off"]) / best["floor"]
    return [
        Figure("demo qfit check / bare float pass", f"{whole:.2f}x", "<= 6x", whole <= 6.0,
               f"whole processes: check {best['check']:.1f} s, float pass {best['floor']:.2f} s over the same {files} "
               f"files; the layer sweep ({section['samples_used']} samples x {section['layers_swept']} layers x 2) "
               f"costs {sweep:.2f}x of it" + ("" if whole <= 6.0 else
                                              f"; missed: without the sweep the check alone is {off:.2f}x")),
        Figure("demo qfit check, layer sweep off / bare float pass", f"{off:.2f}x", "<= 2.5x", off <= 2.5,
               f"--isolated-samples 0: {best['sweep_off']:.1f} s" + ("" if off <= 2.5 else
               "; missed: the stages before the sweep (calibration, integer-path evaluation, budget, repair "
               "pricing, reports) take that long; see the data-pass figures")),
        Figure("peak RSS of the demo check", mib(peaks["check"]), "<= 300 MiB", peaks["check"] <= 300 * 2**20,
               f"child VmHWM; the bare float pass peaks at {mib(peaks['floor'])}, the check with the sweep off at "
               f"{mib(peaks['sweep_off'])}" + ("" if peaks["check"] <= 300 * 2**20 else "; missed: " + (
                   "the stages before the sweep reach it (the same peak with the sweep off)"
                   if peaks["check"] <= 1.05 * peaks["sweep_off"] else
                   f"the sweep adds {mib(peaks['check'] - peaks['sweep_off'])} to the stages before"))),
    ]


def image_files(folder: str) -> list[str]:
    return [os.path.join(d, f) for d, _, fs in os.walk(folder) for f in fs if f.endswith(".png")]


# ---- MobileNetV2 1.0 at 224x224, .npy samples ------------------------------------------------------

def mobilenet_check_figures(sizes: dict, work: str, Figure, zoo, write_samples) -> list:
    """`qfit check --isolated-samples 0` on MobileNetV2 (.npy samples, no labels) against a bare float
    pass over the same files, and its peak RSS at two evaluation sample counts."""
    width, resolution = sizes["check_mobilenet"]
    calib_count, eval_counts = sizes["check_mobilenet_samples"]
    zm = zoo.mobilenet_v2(width, resolution)
    model = os.path.join(work, "mobilenet_check.onnx")
    onnx.save(zm.model, model)
    shape = tuple(d.dim_value for d in zm.model.graph.input[0].type.tensor_type.shape.dim)
    calib, evaluation = os.path.join(work, "mnv2_calib"), os.path.join(work, "mnv2_eval")
    write_samples(calib, shape, calib_count, seed=1)
    write_samples(evaluation, shape, max(eval_counts), seed=2)
    extra = ["--flash", "1GiB", "--sram", "1GiB", "--isolated-samples", "0"]
    many, few = max(eval_counts), min(eval_counts)
    runs, peaks = {"floor": [], "check": []}, {}
    for _ in range(sizes["check_repeats"]):
        runs["floor"].append(float_pass(model, [(calib, None), (evaluation, None)])[0])
        seconds, peaks[many] = qfit_check(model, calib, evaluation, os.path.join(work, "mnv2_check"), *extra)
        runs["check"].append(seconds)
    _, peaks[few] = qfit_check(model, calib, evaluation, os.path.join(work, "mnv2_check_few"), *extra,
                               "--eval-limit", str(few))
    floor, check = min(runs["floor"]), min(runs["check"])
    value = check / floor
    flat = peaks[many] / peaks[few]
    label = f"MobileNetV2 {width} {resolution}"
    return [
        Figure(f"{label}, check with the sweep off / bare float pass", f"{value:.2f}x", "<= 4x", value <= 4.0,
               f"{zm.params / 1e6:.2f} M params, {calib_count} calibration + {many} evaluation .npy files: check "
               f"{check:.1f} s, float pass {floor:.2f} s" + ("" if value <= 4.0 else
               "; missed: calibration and evaluation expose every tensor, and the integer path runs each layer as its own onnxruntime session plus a C requantization pass")),
        Figure(f"{label}, peak RSS of the check ({many} eval samples)", mib(peaks[many]), "<= 1 GiB, flat",
               peaks[many] <= 2**30 and flat <= 1.1,
               f"{mib(peaks[few])} at {few} evaluation samples: {flat:.2f}x for {many / few:.0f}x the samples"
               + ("" if peaks[many] <= 2**30 and flat <= 1.1 else "; missed: a batch exposes every tensor in "
                  "float32 for the float and the int8 pass")),
    ]


# ---- does the ranking inform: the same ranking from two halves of the evaluation folder ----------

def spearman(first: list[str], second: list[str]) -> float:
    """Spearman's rank correlation of two rankings of the same names without ties (Spearman 1904)."""
    position = {name: i for i, name in enumerate(second)}
    n = len(first)
    return 1 - 6 * sum((i - position[name]) ** 2 for i, name in enumerate(first)) / (n * (n * n - 1))


def ranking_halves_figure(sizes: dict, work: str, Figure) -> object:
    """The demo quantized once (library, sweep off), then the sweep at the default sample count on each
    half of the evaluation folder (every other file: both halves hold every class)."""
    from qfit import check as pipeline
    from qfit.data import load_preprocess
    from qfit.measure import sensitivity
    from qfit.measure.evaluate import sample_of

    calib_limit, eval_limit = sizes["check_demo_limits"]
    cap = sizes["halves_samples"] or sensitivity.DEFAULT_SAMPLE_CAP
    result = pipeline.check(pipeline.CheckOptions(
        model_path=os.path.join(DEMO, "model.onnx"), calib_dir=os.path.join(DEMO, "calib"),
        eval_dir=os.path.join(DEMO, "eval"), out_dir=os.path.join(work, "halves"), flash_limit_bytes=1 << 20,
        sram_limit_bytes=256 << 10, preprocess=load_preprocess(os.path.join(DEMO, "preprocess.json")),
        limit=calib_limit, eval_limit=eval_limit, isolated_samples=0, progress=False))
    final = result.final
    rankings = []
    for parity in (0, 1):
        half = copy.copy(final.evaluation.data)
        half.files = final.evaluation.data.files[parity::2]
        half.labels = None if half.labels is None else final.evaluation.data.labels[parity::2]
        swept = sensitivity.sweep(final.quantized.reference, final.quantized.plan, final.quantized.model,
                                  final.evaluation.layers, sample_of(half, cap, 0), 16, "classification")
        rankings.append(swept["ranking"])
    value = spearman(*rankings)
    return Figure("ranking rank correlation, two halves of the demo eval folder", f"{value:.3f}", ">= 0.9",
                  value >= 0.9, f"{len(rankings[0])} layers, {cap} samples from each half of "
                  f"{len(final.evaluation.data)}"
                  f"{' (the default sample count)' if cap == sensitivity.DEFAULT_SAMPLE_CAP else ''}; ranked by "
                  f"{sensitivity.RANK_KEY}" + ("" if value >= 0.9 else "; missed: raise --isolated-samples"))


def simd_flags() -> str:
    """The CPU's SIMD extensions as /proc/cpuinfo lists them (x86 `flags`, Arm `Features`)."""
    wanted = ("sse", "ssse3", "avx", "fma", "f16c", "vnni", "amx", "neon", "asimd", "sve", "dotprod", "i8mm")
    try:
        with open("/proc/cpuinfo") as f:
            line = next(l for l in f if l.startswith(("flags", "Features")))
    except (OSError, StopIteration):
        return "unknown"
    flags = [flag for flag in line.split(":", 1)[1].split() if flag.startswith(wanted) or "vnni" in flag]
    return " ".join(sorted(dict.fromkeys(flags))) or "none listed"


def load_average() -> str:
    try:
        return " / ".join(f"{v:.1f}" for v in os.getloadavg())
    except OSError:
        return "unknown"
