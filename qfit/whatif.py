"""whatif: what would make a model fit (filled in below)."""
from __future__ import annotations


def what_if(loaded, plan, options, result) -> dict:
    return {}


def sections(what_if: dict) -> list:
    return []
