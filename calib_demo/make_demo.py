"""Build the Millbrook parts-tray demo: images, a trained float model, and its preprocessing.

Run from anywhere:  python calib_demo/make_demo.py
Needs torch (training only), numpy, Pillow, onnx, onnxruntime. Everything is seeded, so a rerun
rewrites the same images and trains the same network up to float round-off.
"""

import argparse
import json
import shutil
import time
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFilter

HERE = Path(__file__).resolve().parent
SIZE = 96                 # final image side, pixels; images are written at this size so no resize
SUPER = 2                 # draw at 2x and downsample, for antialiased edges
CLASSES = sorted(["bolt", "hex_nut", "l_bracket", "spring", "washer", "wing_nut"])

# Split ids feed the per-image seed, so the three sets never share an image.
SPLIT_TRAIN, SPLIT_CALIB, SPLIT_EVAL = 1, 2, 3

# Surfaces the tray camera sees: rubber belt, plywood bench, green cutting mat, grey steel sheet.
BACKGROUNDS = [(58, 60, 63), (176, 140, 96), (62, 102, 78), (128, 131, 134)]
# Part finishes: bright zinc, brass, black oxide, yellow zinc, stainless.
FINISHES = [(196, 200, 204), (190, 152, 70), (52, 50, 52), (204, 186, 96), (160, 166, 172)]


# ---------------------------------------------------------------- shapes in a unit frame

def _circle(cx, cy, r, n=40):
    t = np.linspace(0, 2 * np.pi, n, endpoint=False)
    return np.stack([cx + r * np.cos(t), cy + r * np.sin(t)], 1)


def _rect(x0, y0, x1, y1):
    return np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]], float)


def shape_parts(name, rng):
    """Return (solids, holes, strokes) polygons in a frame of radius ~1.

    Holes are punched out of the solids; strokes are thin darker lines (threads, edges).
    """
    solids, holes, strokes = [], [], []
    if name == "hex_nut":
        t = np.arange(6) * np.pi / 3
        solids.append(np.stack([np.cos(t), np.sin(t)], 1))
        holes.append(_circle(0, 0, rng.uniform(0.42, 0.55)))
        strokes.append(_circle(0, 0, rng.uniform(0.75, 0.82)))   # chamfer ring
    elif name == "washer":
        solids.append(_circle(0, 0, 1.0))
        holes.append(_circle(0, 0, rng.uniform(0.40, 0.55)))
    elif name == "wing_nut":
        solids.append(_circle(0, 0, 0.45))
        for side in (-1, 1):
            lobe = np.array([[0.25, -0.25], [0.95, -0.55], [1.05, -0.15], [0.95, 0.2], [0.3, 0.22]])
            lobe[:, 0] *= side
            solids.append(lobe)
        holes.append(_circle(0, 0, 0.2))
    elif name == "bolt":
        length = rng.uniform(0.8, 1.1)
        solids.append(_rect(-1.0, -0.42, -0.62, 0.42))           # head, side view
        solids.append(_rect(-0.64, -0.17, length, 0.17))         # shank
        for x in np.arange(-0.2, length - 0.05, 0.11):
            strokes.append(np.array([[x, -0.17], [x + 0.06, 0.17]]))
    elif name == "spring":
        turns = rng.integers(5, 9)
        xs = np.linspace(-1, 1, 2 * turns + 1)
        ys = np.where(np.arange(len(xs)) % 2 == 0, -0.35, 0.35)
        strokes.append(np.stack([xs, ys], 1))                    # drawn thick as the coil itself
    elif name == "l_bracket":
        arm = rng.uniform(0.38, 0.5)
        solids.append(np.array([[-1, -1], [1, -1], [1, -1 + arm], [-1 + arm, -1 + arm],
                                [-1 + arm, 1], [-1, 1]], float))
        r = arm * 0.28
        for c in [(0.55, -1 + arm / 2), (-1 + arm / 2, 0.55), (-1 + arm / 2, -1 + arm / 2)]:
            holes.append(_circle(c[0], c[1], r, 20))
    else:
        raise ValueError(name)
    return solids, holes, strokes


# ---------------------------------------------------------------- one picture

def _smooth_field(rng, n, amp):
    """Low-frequency brightness field: uneven shop lighting."""
    coarse = rng.normal(0, amp, (4, 4)).astype(np.float32)
    img = Image.fromarray(coarse, mode="F").resize((n, n), Image.BICUBIC)
    return np.asarray(img)


def draw_item(label, rng):
    """Draw one tray photo of a part of class `label` (a name in CLASSES) as an RGB image."""
    n = SIZE * SUPER
    bg = np.array(BACKGROUNDS[rng.integers(len(BACKGROUNDS))], np.float32)
    bg = bg * (1 + rng.normal(0, 0.05, 3)) + rng.normal(0, 12)
    canvas = np.ones((n, n, 3), np.float32) * bg
    # Belt seams / wood grain: faint parallel lines at a random angle.
    grain = Image.new("L", (n, n), 0)
    gd = ImageDraw.Draw(grain)
    ang = rng.uniform(0, np.pi)
    for off in rng.uniform(-n, n, rng.integers(3, 12)):
        dx, dy = np.cos(ang) * 2 * n, np.sin(ang) * 2 * n
        cx, cy = n / 2 - np.sin(ang) * off, n / 2 + np.cos(ang) * off
        gd.line([(cx - dx, cy - dy), (cx + dx, cy + dy)], fill=int(rng.integers(20, 70)),
                width=int(rng.integers(1, 4)))
    canvas -= np.asarray(grain, np.float32)[..., None] * 0.35

    # Clutter: oil stains, swarf curls, and a stray small part of another kind at the edge.
    clutter = Image.new("L", (n, n), 0)
    cd = ImageDraw.Draw(clutter)
    for _ in range(rng.integers(0, 4)):
        x, y, r = rng.uniform(0, n), rng.uniform(0, n), rng.uniform(6, 26)
        cd.ellipse([x - r, y - r * rng.uniform(0.5, 1), x + r, y + r], fill=int(rng.integers(30, 90)))
    canvas -= np.asarray(clutter.filter(ImageFilter.GaussianBlur(4)), np.float32)[..., None] * 0.6
    swarf = Image.new("L", (n, n), 0)
    sd = ImageDraw.Draw(swarf)
    for _ in range(rng.integers(2, 14)):
        x, y = rng.uniform(0, n, 2)
        pts = [(x, y)]
        for _ in range(rng.integers(2, 6)):
            x, y = x + rng.normal(0, 9), y + rng.normal(0, 9)
            pts.append((x, y))
        sd.line(pts, fill=255, width=int(rng.integers(1, 4)))
    swarf_col = np.array(FINISHES[rng.integers(len(FINISHES))], np.float32)
    sw = np.asarray(swarf, np.float32)[..., None] / 255.0
    canvas = canvas * (1 - sw) + swarf_col * sw

    # The part itself.
    mask, lines = _part_masks(label, rng, n, scale=rng.uniform(0.16, 0.38) * n,
                              centre=n / 2 + rng.normal(0, n * 0.09, 2))
    # Sometimes a neighbouring part pokes in from an edge: the camera frames loosely.
    if rng.random() < 0.35:
        other = CLASSES[rng.integers(len(CLASSES))]
        edge = rng.integers(4)
        pos = rng.uniform(0, n, 2)
        pos[edge % 2] = (n * 1.02) if edge < 2 else -n * 0.02
        om, ol = _part_masks(other, rng, n, scale=rng.uniform(0.15, 0.25) * n, centre=pos)
        canvas = _paint(canvas, om, ol, rng)
    canvas = _paint(canvas, mask, lines, rng)

    canvas *= (1 + _smooth_field(rng, n, 0.12))[..., None]
    img = Image.fromarray(np.clip(canvas, 0, 255).astype(np.uint8), "RGB")
    img = img.resize((SIZE, SIZE), Image.LANCZOS)
    if rng.random() < 0.6:
        img = img.filter(ImageFilter.GaussianBlur(rng.uniform(0.3, 1.4)))   # focus drift
    arr = np.asarray(img, np.float32)
    arr = arr * rng.uniform(0.75, 1.2) + rng.normal(0, 10)               # exposure
    arr = arr * (1 + rng.normal(0, 0.06, 3))                             # white balance
    arr = arr + rng.normal(0, rng.uniform(1, 4), arr.shape)             # sensor noise
    return Image.fromarray(np.clip(arr + 0.5, 0, 255).astype(np.uint8), "RGB")


def _part_masks(label, rng, n, scale, centre):
    solids, holes, strokes = shape_parts(label, rng)
    rot = rng.uniform(0, 2 * np.pi)
    c, s = np.cos(rot), np.sin(rot)
    m = np.array([[c, -s], [s, c]]) * scale * rng.uniform(0.85, 1.15, 2)  # slight foreshortening
    place = lambda p: [tuple(q) for q in (p @ m.T + centre)]
    mask = Image.new("L", (n, n), 0)
    md = ImageDraw.Draw(mask)
    lines = Image.new("L", (n, n), 0)
    ld = ImageDraw.Draw(lines)
    for p in solids:
        md.polygon(place(p), fill=255)
    for p in holes:
        md.polygon(place(p), fill=0)
    if label == "spring":
        # The coil is the stroke itself, drawn as solid wire.
        md.line(place(strokes[0]), fill=255, width=max(2, int(scale * 0.16)), joint="curve")
    else:
        for p in strokes:
            closed = len(p) > 2
            pts = place(p) + (place(p)[:1] if closed else [])
            ld.line(pts, fill=255, width=max(1, int(scale * 0.05)))
    return mask, lines


def _paint(canvas, mask, lines, rng):
    """Shadow, then the metal body with a light-to-dark sheen, then darker detail lines."""
    n = canvas.shape[0]
    m = np.asarray(mask, np.float32) / 255.0
    off = rng.integers(2, 9, 2)
    shadow = np.asarray(mask.filter(ImageFilter.GaussianBlur(5)), np.float32) / 255.0
    shadow = np.roll(shadow, tuple(off), (0, 1))
    canvas = canvas * (1 - 0.45 * shadow[..., None])
    col = np.array(FINISHES[rng.integers(len(FINISHES))], np.float32)
    col = col * rng.uniform(0.8, 1.15) * (1 + rng.normal(0, 0.04, 3))
    yy, xx = np.mgrid[0:n, 0:n] / n
    a = rng.uniform(0, 2 * np.pi)
    sheen = 1 + 0.35 * ((xx - 0.5) * np.cos(a) + (yy - 0.5) * np.sin(a))
    body = col * sheen[..., None]
    canvas = canvas * (1 - m[..., None]) + body * m[..., None]
    ln = (np.asarray(lines, np.float32) / 255.0 * m)[..., None]
    return canvas * (1 - 0.45 * ln)


def make_image(split, index):
    """Deterministic (label, image) for a position in a split; labels cycle through the classes."""
    rng = np.random.default_rng([split, index, 20240611])
    label = index % len(CLASSES)
    return label, draw_item(CLASSES[label], rng)



# ---------------------------------------------------------------- image sets on disk

N_TRAIN = 4800            # kept in memory only
N_CALIB = 240             # unlabeled, flat folder
N_EVAL = 600              # 100 per class, in class subfolders


def _render(job):
    split, index = job
    label, img = make_image(split, index)
    return label, np.asarray(img, np.uint8)


def render_split(split, count, workers):
    from multiprocessing import Pool
    jobs = [(split, i) for i in range(count)]
    with Pool(workers) as pool:
        results = pool.map(_render, jobs, chunksize=32)
    labels = np.array([r[0] for r in results], np.int64)
    pixels = np.stack([r[1] for r in results])
    return labels, pixels


def write_folder(root, labels, pixels, by_class):
    """Replace `root` with PNG files; by_class puts each file under its class name."""
    if root.exists():
        shutil.rmtree(root)
    for i, (label, arr) in enumerate(zip(labels, pixels)):
        folder = root / CLASSES[label] if by_class else root
        folder.mkdir(parents=True, exist_ok=True)
        stem = f"{CLASSES[label]}_{i:04d}" if by_class else f"tray_{i:04d}"
        Image.fromarray(arr, "RGB").save(folder / f"{stem}.png", optimize=True)


# ---------------------------------------------------------------- network

def build_model(num_classes):
    import torch.nn as nn

    def conv_bn(cin, cout, k, stride=1, groups=1, act=True):
        layers = [nn.Conv2d(cin, cout, k, stride, k // 2, groups=groups, bias=False),
                  nn.BatchNorm2d(cout)]
        if act:
            layers.append(nn.ReLU6(inplace=True))
        return layers

    class Bottleneck(nn.Module):
        """Expand 1x1 -> depthwise 3x3 -> project 1x1; residual Add when the shape allows."""

        def __init__(self, cin, cout, expand, stride):
            super().__init__()
            self.residual = stride == 1 and cin == cout
            self.body = nn.Sequential(*conv_bn(cin, expand, 1),
                                      *conv_bn(expand, expand, 3, stride, groups=expand),
                                      *conv_bn(expand, cout, 1, act=False))

        def forward(self, x):
            y = self.body(x)
            return x + y if self.residual else y

    # (cin, cout, expanded width, stride). The 48x48 residual block is where activation memory
    # peaks; the 6x6 and 3x3 blocks are where most of the weights sit.
    plan = [(16, 16, 40, 1), (16, 24, 64, 2), (24, 24, 96, 1), (24, 48, 144, 2),
            (48, 48, 192, 1), (48, 96, 288, 2), (96, 96, 384, 1), (96, 128, 512, 2),
            (128, 128, 640, 1)]
    head_width = 512
    return nn.Sequential(
        *conv_bn(3, 16, 3, stride=2),
        *[Bottleneck(*p) for p in plan],
        *conv_bn(plan[-1][1], head_width, 1),
        nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Dropout(0.2),
        nn.Linear(head_width, num_classes))


def train(model, pixels, labels, mean, std, epochs, seed):
    import torch
    import torch.nn.functional as F
    torch.manual_seed(seed)
    g = torch.Generator().manual_seed(seed)
    x_all = torch.from_numpy(pixels).permute(0, 3, 1, 2).contiguous()       # uint8 NCHW
    y_all = torch.from_numpy(labels)
    m = torch.tensor(mean).view(1, 3, 1, 1)
    s = torch.tensor(std).view(1, 3, 1, 1)
    batch = 64
    steps = epochs * (len(x_all) // batch)
    opt = torch.optim.AdamW(model.parameters(), lr=4e-3, weight_decay=1e-4)
    sched = torch.optim.lr_scheduler.OneCycleLR(opt, max_lr=4e-3, total_steps=steps, pct_start=0.2)
    # channels_last roughly halves the CPU time of the depthwise convs.
    model.to(memory_format=torch.channels_last)
    model.train()
    for epoch in range(epochs):
        order = torch.randperm(len(x_all), generator=g)
        total, correct, loss_sum = 0, 0, 0.0
        t0 = time.time()
        for b in range(len(x_all) // batch):
            idx = order[b * batch:(b + 1) * batch]
            x = (x_all[idx].float() / 255.0 - m) / s
            # A part turned by 90 degrees or mirrored is still the same kind of part; this
            # stretches the small in-memory set without drawing more images.
            flip = torch.rand(len(idx), generator=g) < 0.5
            x = torch.where(flip.view(-1, 1, 1, 1), x.flip(3), x)
            x = torch.rot90(x, int(torch.randint(4, (1,), generator=g)), (2, 3))
            x = x.contiguous(memory_format=torch.channels_last)
            y = y_all[idx]
            out = model(x)
            loss = F.cross_entropy(out, y, label_smoothing=0.05)
            opt.zero_grad()
            loss.backward()
            opt.step()
            sched.step()
            loss_sum += loss.item() * len(idx)
            correct += (out.argmax(1) == y).sum().item()
            total += len(idx)
        print(f"  epoch {epoch + 1}/{epochs}: loss {loss_sum / total:.3f} "
              f"train acc {correct / total:.3f} ({time.time() - t0:.0f}s)", flush=True)
    model.eval()
    return model.to(memory_format=torch.contiguous_format)


def export(model, path):
    import warnings
    import torch
    dummy = torch.zeros(1, 3, SIZE, SIZE)
    # PRESERVE keeps BatchNormalization nodes in the file (EVAL would fuse them into the convs);
    # the quantizer is meant to fold them itself.
    # The model is in eval mode, so the warning about folding training graphs is moot, and the
    # legacy exporter is chosen on purpose.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        warnings.simplefilter("ignore", DeprecationWarning)
        torch.onnx.export(model, dummy, str(path), input_names=["image"],
                          output_names=["logits"], opset_version=17, dynamo=False,
                          do_constant_folding=True, training=torch.onnx.TrainingMode.PRESERVE)


# ---------------------------------------------------------------- sizing from the ONNX file

# Ops whose output can overwrite their input in place, or vanish when BN is folded into the conv
# before them: they neither start a new buffer nor count as a step of their own.
ALIAS_OPS = {"BatchNormalization", "Relu", "Clip", "Flatten", "Reshape", "Identity", "Dropout"}


def weight_sizes(model_proto):
    """Parameters after BN folding: every Conv/Gemm weight plus one bias per output channel."""
    import onnx.numpy_helper as nh
    inits = {t.name: nh.to_array(t) for t in model_proto.graph.initializer}
    params = 0
    int8_bytes = 0
    for node in model_proto.graph.node:
        if node.op_type not in ("Conv", "Gemm"):
            continue
        w = inits[node.input[1]]
        out_ch = w.shape[0]
        params += w.size + out_ch                       # folded BN always leaves a bias
        int8_bytes += w.size + 4 * out_ch + 4 * out_ch  # int8 weights, int32 bias, fp32 scales
    return params, 4 * params, int8_bytes


def peak_live_bytes(model_proto, bytes_per_element=1):
    """Largest sum of live activation bytes over the steps of the graph in file order."""
    import onnx
    inferred = onnx.shape_inference.infer_shapes(model_proto)
    g = inferred.graph
    shapes = {}
    for vi in list(g.input) + list(g.value_info) + list(g.output):
        dims = [d.dim_value for d in vi.type.tensor_type.shape.dim]
        shapes[vi.name] = int(np.prod(dims)) if dims else 1
    constants = {t.name for t in g.initializer}
    root, start, end, steps = {}, {}, {}, []
    for vi in g.input:
        if vi.name not in constants:
            root[vi.name] = vi.name
            start[vi.name] = 0
    for node in g.node:
        if node.op_type == "Constant":
            constants.update(node.output)
            continue
        acts = [i for i in node.input if i and i not in constants]
        if node.op_type in ALIAS_OPS:
            root[node.output[0]] = root[acts[0]]
            continue
        step = len(steps)
        steps.append(node)
        for i in acts:
            end[root[i]] = max(end.get(root[i], 0), step)
        for o in node.output:
            root[o] = o
            start[o] = step
            end[o] = step
    for vi in g.output:
        end[root[vi.name]] = len(steps) - 1
    best = (0, None, [])
    for step, node in enumerate(steps):
        live = [b for b in start if start[b] <= step <= end[b]]
        total = sum(shapes[b] for b in live) * bytes_per_element
        if total > best[0]:
            best = (total, node, live)
    total, node, live = best
    detail = [(b, shapes[b] * bytes_per_element) for b in live]
    return total, node, detail


# ---------------------------------------------------------------- checking the exported file

def load_preprocessed(path, prep):
    img = Image.open(path).convert(prep["color"])
    h, w = prep["size"]
    if img.size != (w, h):
        img = img.resize((w, h), Image.BILINEAR)
    x = np.asarray(img, np.float32) * prep["scale"]
    x = (x - np.array(prep["mean"], np.float32)) / np.array(prep["std"], np.float32)
    return x.transpose(2, 0, 1)[None]


def onnx_eval_accuracy(model_path, eval_root, prep):
    """Top-1 of the ONNX file on the eval folder, read back from the PNGs as a user would."""
    import onnxruntime as ort
    sess = ort.InferenceSession(str(model_path), providers=["CPUExecutionProvider"])
    classes = sorted(p.name for p in eval_root.iterdir() if p.is_dir())
    correct = total = 0
    confusion = np.zeros((len(classes), len(classes)), np.int64)
    for label, name in enumerate(classes):
        for f in sorted((eval_root / name).glob("*.png")):
            logits = sess.run(["logits"], {"image": load_preprocessed(f, prep)})[0]
            pred = int(np.argmax(logits))
            confusion[label, pred] += 1
            correct += pred == label
            total += 1
    return correct / total, classes, confusion


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--epochs", type=int, default=10)
    ap.add_argument("--train-count", type=int, default=N_TRAIN)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--seed", type=int, default=7)
    args = ap.parse_args()

    import onnx
    import torch
    torch.set_num_threads(2)
    t0 = time.time()
    print("drawing images ...", flush=True)
    train_y, train_x = render_split(SPLIT_TRAIN, args.train_count, args.workers)
    calib_y, calib_x = render_split(SPLIT_CALIB, N_CALIB, args.workers)
    eval_y, eval_x = render_split(SPLIT_EVAL, N_EVAL, args.workers)
    write_folder(HERE / "calib", calib_y, calib_x, by_class=False)
    write_folder(HERE / "eval", eval_y, eval_x, by_class=True)
    print(f"  {len(train_y)} train (memory), {N_CALIB} calib, {N_EVAL} eval "
          f"({time.time() - t0:.0f}s)", flush=True)

    # Per-channel statistics of the training pixels, rounded so the JSON reads cleanly.
    mean = [round(float(v), 3) for v in train_x.reshape(-1, 3).mean(0) / 255.0]
    std = [round(float(v), 3) for v in train_x.reshape(-1, 3).std(0) / 255.0]
    prep = {"size": [SIZE, SIZE], "resize": "bilinear", "color": "RGB", "layout": "NCHW",
            "scale": 1 / 255.0, "mean": mean, "std": std}
    (HERE / "preprocess.json").write_text(json.dumps(prep, indent=2) + "\n")

    model = build_model(len(CLASSES))
    print("training ...", flush=True)
    train(model, train_x, train_y, mean, std, args.epochs, args.seed)

    model_path = HERE / "model.onnx"
    export(model, model_path)
    proto = onnx.load(str(model_path))
    onnx.checker.check_model(proto)

    params, float_bytes, int8_bytes = weight_sizes(proto)
    peak, node, live = peak_live_bytes(proto)
    bn_count = sum(n.op_type == "BatchNormalization" for n in proto.graph.node)
    add_count = sum(n.op_type == "Add" for n in proto.graph.node)
    print(f"graph: {len(proto.graph.node)} nodes, {bn_count} BatchNormalization, "
          f"{add_count} residual Add")
    print(f"params (BN folded): {params:,}")
    print(f"float32 weights: {float_bytes:,} B ({float_bytes / 2**20:.3f} MiB)")
    print(f"int8 weights est.: {int8_bytes:,} B ({int8_bytes / 2**20:.3f} MiB)")
    print(f"peak live int8 activations: {peak:,} B ({peak / 1024:.1f} KiB) "
          f"at {node.op_type} '{node.name}'")
    for name, nbytes in live:
        print(f"    live {name}: {nbytes:,} B")

    acc, classes, confusion = onnx_eval_accuracy(model_path, HERE / "eval", prep)
    assert classes == CLASSES
    print(f"float top-1 on eval (onnxruntime, from PNG): {acc:.4f}")
    print("confusion (rows = truth):", " ".join(CLASSES))
    for name, row in zip(CLASSES, confusion):
        print(f"  {name:>10}: {row.tolist()}")
    print(f"done in {time.time() - t0:.0f}s")


if __name__ == "__main__":
    main()
