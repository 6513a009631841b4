"""qfit: int8 post-training quantization of ONNX models, with a flash/SRAM fit verdict for MCUs."""

__version__ = "0.1.0"

from qfit.errors import QfitError  # noqa: E402,F401
