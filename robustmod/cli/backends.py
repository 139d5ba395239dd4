"""``robustmod backends``: each back-end id with its label, the defaults marked."""
from __future__ import annotations

import argparse
from typing import Any

from .. import defaults


def add_command(subparsers: Any) -> None:
    b = subparsers.add_parser("backends", help="list the back-end ids", description="List the back-end ids.")
    b.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from ..backends.registry import REGISTRY, make_backend  # noqa: PLC0415  (back-ends only when listing)

    width = max(len(b) for b in REGISTRY)
    for bid in REGISTRY:
        label = getattr(make_backend(bid), "label", "")
        print(f"{bid.ljust(width)}  {label}{'  [default]' if bid in defaults.BACKENDS else ''}")
    return 0
