"""Train the small CNN in tests/models/digits_cnn.onnx on scikit-learn's bundled digits set.

Data: `sklearn.datasets.load_digits` (UCI "Optical Recognition of Handwritten Digits": 1797
8x8 greyscale images, pixel values 0..16, 10 classes). The file ships inside scikit-learn, so
nothing is downloaded and the tests can rebuild the exact same held-out set.

Split (the tests use the same call):
    train_test_split(X, y, test_size=0.3, random_state=0, stratify=y)
    -> 1257 training images, 540 held-out images.
Input scaling: image = pixels / 16.0 as float32, shape [N, 1, 8, 8] (NCHW, one channel).

Run (needs torch, which the tests do not):
    python tests/models/train_digits.py            # writes tests/models/digits_cnn.onnx

Only this script needs torch; the exported ONNX file is committed.
"""

import argparse
import pathlib

import numpy as np
import torch
from sklearn.datasets import load_digits
from sklearn.model_selection import train_test_split
from torch import nn

HERE = pathlib.Path(__file__).resolve().parent
SEED = 0
PIXEL_SCALE = 1.0 / 16.0  # digits pixels are integers 0..16


def load_split():
    """The split shared with the tests: 70/30, stratified, random_state=0."""
    digits = load_digits()
    images = (digits.images.astype(np.float32) * PIXEL_SCALE)[:, None, :, :]
    return train_test_split(images, digits.target, test_size=0.3, random_state=0, stratify=digits.target)


class DigitsCNN(nn.Module):
    def __init__(self):
        super().__init__()
        self.features = nn.Sequential(
            nn.Conv2d(1, 16, 3, padding=1, bias=False), nn.BatchNorm2d(16), nn.ReLU(),   # 16x8x8
            nn.Conv2d(16, 32, 3, padding=1, bias=False), nn.BatchNorm2d(32), nn.ReLU(),  # 32x8x8
            nn.MaxPool2d(2),                                                              # 32x4x4
            nn.Conv2d(32, 32, 3, padding=1, bias=False), nn.BatchNorm2d(32), nn.ReLU(),  # 32x4x4
            nn.AdaptiveAvgPool2d(1),                                                      # exports as GlobalAveragePool
            nn.Flatten(),
        )
        self.classifier = nn.Linear(32, 10)

    def forward(self, image):
        return self.classifier(self.features(image))


def accuracy(model, images, labels):
    model.eval()
    with torch.no_grad():
        predicted = model(torch.from_numpy(images)).argmax(dim=1).numpy()
    return float((predicted == labels).mean())


def train(epochs: int):
    torch.manual_seed(SEED)
    torch.use_deterministic_algorithms(True)
    torch.set_num_threads(1)  # same float summation order on every run
    x_train, x_test, y_train, y_test = load_split()
    model = DigitsCNN()
    optimizer = torch.optim.AdamW(model.parameters(), lr=3e-3, weight_decay=1e-4)
    scheduler = torch.optim.lr_scheduler.CosineAnnealingLR(optimizer, T_max=epochs)
    loss_fn = nn.CrossEntropyLoss()
    generator = torch.Generator().manual_seed(SEED)
    xt, yt = torch.from_numpy(x_train), torch.from_numpy(y_train).long()
    for epoch in range(epochs):
        model.train()
        order = torch.randperm(len(xt), generator=generator)
        for start in range(0, len(xt), 32):
            batch = order[start:start + 32]
            images = xt[batch]
            # One-pixel random shifts: a cheap augmentation that suits 8x8 digits.
            shift = torch.randint(-1, 2, (2,), generator=generator).tolist()
            images = torch.roll(images, shifts=shift, dims=(2, 3))
            optimizer.zero_grad()
            loss = loss_fn(model(images), yt[batch])
            loss.backward()
            optimizer.step()
        scheduler.step()
        if (epoch + 1) % 10 == 0:
            print(f"epoch {epoch + 1}: loss {loss.item():.4f} held-out acc {accuracy(model, x_test, y_test):.4f}")
    return model, x_test, y_test


def export(model, path: pathlib.Path):
    model.eval()
    example = torch.zeros(1, 1, 8, 8)
    torch.onnx.export(
        model, (example,), str(path), dynamo=False, opset_version=13,
        input_names=["image"], output_names=["logits"],
        dynamic_axes={"image": {0: "N"}, "logits": {0: "N"}},
        # PRESERVE keeps the BatchNormalization nodes (EVAL would fold them into the convs),
        # so the tool's own BN folding meets a real exporter's output.
        training=torch.onnx.TrainingMode.PRESERVE,
    )


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--epochs", type=int, default=60)
    parser.add_argument("--out", type=pathlib.Path, default=HERE / "digits_cnn.onnx")
    args = parser.parse_args()
    model, x_test, y_test = train(args.epochs)
    params = sum(p.numel() for p in model.parameters())
    export(model, args.out)

    import onnxruntime as ort  # check the exported file, not the torch module
    session = ort.InferenceSession(str(args.out), providers=["CPUExecutionProvider"])
    logits = session.run(["logits"], {"image": x_test})[0]
    onnx_acc = float((logits.argmax(axis=1) == y_test).mean())
    print(f"torch held-out accuracy: {accuracy(model, x_test, y_test):.4f}")
    print(f"onnx held-out accuracy:  {onnx_acc:.4f} on {len(y_test)} images")
    print(f"trainable params: {params}")
    print(f"onnx file: {args.out} ({args.out.stat().st_size} bytes)")


if __name__ == "__main__":
    main()
