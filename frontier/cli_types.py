"""argparse value types the ``sluice`` commands share (``frontier/cli.py``,
``frontier/bench/cli.py``)."""

from __future__ import annotations

import argparse
from typing import Any


def positive(kind: type) -> Any:
    """An argparse type: a number above zero."""

    def parse(text: str) -> Any:
        try:
            value = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
        if not value > 0:
            raise argparse.ArgumentTypeError(f"must be above 0, got {text}")
        return value

    parse.__name__ = kind.__name__
    return parse
