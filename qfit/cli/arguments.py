"""arguments: what every command's parser shares — the model and limit arguments, and the library's
defaults (each option's default is written once, in the library's options dataclass)."""
from __future__ import annotations

import argparse
import dataclasses

from qfit.errors import QfitError
from qfit.memory.options import MAX_ORDER_TIME_LIMIT_S


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


def add_arena_options(p: argparse.ArgumentParser, options_class) -> None:
    """The conventions of the arena plan, shared by `qfit budget` and `qfit export` (defaults from
    `options_class`, qfit.memory.budget.BudgetOptions)."""
    d = lambda name: default_of(options_class, name)  # noqa: E731 - the defaults live in the options class
    p.add_argument("--alignment", type=int, default=d("alignment"), metavar="N",
                   help=f"arena alignment in bytes (default {d('alignment')})")
    p.add_argument("--no-views", action="store_true", help="count Reshape/Flatten/Squeeze/Unsqueeze outputs as copies")
    p.add_argument("--no-inplace", action="store_true", help="elementwise ops never overwrite their input")
    p.add_argument("--order-time-limit", type=float, default=d("order_time_limit_s"), metavar="S",
                   help=f"seconds for the execution-order search (default {d('order_time_limit_s'):g})")
    p.add_argument("--no-order-search", action="store_true", help="keep the graph's node order")


def arena_options(args: argparse.Namespace) -> dict:
    """The BudgetOptions fields `add_arena_options` sets, refused in one line when out of range."""
    if args.alignment < 1 or args.alignment & (args.alignment - 1):
        raise QfitError(f"--alignment: must be a power of two, got {args.alignment}")
    if not 0 <= args.order_time_limit <= MAX_ORDER_TIME_LIMIT_S:
        raise QfitError(f"--order-time-limit: must be between 0 and {MAX_ORDER_TIME_LIMIT_S:g} seconds, "
                        f"got {args.order_time_limit}")
    return dict(alignment=args.alignment, views=not args.no_views, inplace=not args.no_inplace,
                order_search=not args.no_order_search, order_time_limit_s=args.order_time_limit)
