"""arguments: what every command's parser shares — the model and limit arguments, and the library's
defaults (each option's default is written once, in the library's options dataclass)."""
from __future__ import annotations

import argparse
import dataclasses


def default_of(options_class, name: str):
    """The default of one field of an options dataclass: the CLI shows and uses the library's own."""
    return {f.name: f.default for f in dataclasses.fields(options_class)}[name]


def add_model_and_limits(p: argparse.ArgumentParser, model_help: str) -> None:
    """The arguments every command takes: the model, the two limits, the reserve, fixed input shapes."""
    p.add_argument("model", help=model_help)
    p.add_argument("--flash", required=True, help="flash available for the model, e.g. 1MiB")
    p.add_argument("--sram", required=True, help="SRAM available for activations, e.g. 256KiB")
    p.add_argument("--flash-reserve", default="0", help="flash kept for code and runtime (estimate)")
    p.add_argument("--input-shape", action="append", metavar="NAME=1x3x96x96",
                   help="fix the dimensions of an input (repeatable)")
