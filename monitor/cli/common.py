"""Pieces every verb group shares: the caution, aligned tables, option types, and turning
a busy store or an unreadable input file into a one-line :class:`UserError`."""
from __future__ import annotations

import argparse
import functools
import math
import sqlite3
from pathlib import Path
from typing import Callable, Iterable, Sequence

from monitor.cli.errors import UserError
from predictor.caution import CAUTION

__all__ = ["CAUTION", "table", "positive_int", "count", "finite_float", "store_errors", "input_file"]


def table(rows: Sequence[Sequence[object]], head: Sequence[str], right: Iterable[int] = (),
          rule: bool = True) -> str:
    """Columns padded to their widest cell, two spaces apart; ``right`` columns right-aligned."""
    right = set(right)
    cells = [[str(c) for c in r] for r in [head, *rows]]
    widths = [max(len(r[i]) for r in cells) for i in range(len(head))]

    def line(r: list[str]) -> str:
        return "  ".join(c.rjust(w) if i in right else c.ljust(w)
                         for i, (c, w) in enumerate(zip(r, widths))).rstrip()

    out = [line(cells[0])]
    if rule:
        out.append("  ".join("-" * w for w in widths))
    out += [line(r) for r in cells[1:]]
    return "\n".join(out)


def _whole_number(minimum: int) -> Callable[[str], int]:
    def parse(text: str) -> int:
        try:
            n = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
        if n < minimum:
            raise argparse.ArgumentTypeError(f"expected {minimum} or more, got {text!r}")
        return n
    return parse


positive_int = _whole_number(1)  # argparse type: 1, 2, 3, ...
count = _whole_number(0)  # argparse type: 0, 1, 2, ...


def finite_float(text: str) -> float:
    """argparse type: a finite number (no nan, no inf)."""
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not math.isfinite(v):
        raise argparse.ArgumentTypeError(f"expected a finite number, got {text!r}")
    return v


def input_file(path: str | Path, what: str = "file") -> Path:
    """``path`` when it is a readable regular file; otherwise a UserError saying why."""
    p = Path(path)
    if not p.exists():
        raise UserError(f"{p}: no such {what}")
    if p.is_dir():
        raise UserError(f"{p}: is a folder, expected a {what}")
    if not p.is_file():
        raise UserError(f"{p}: not a regular file, expected a {what}")
    try:
        with open(p, "rb"):
            pass
    except OSError as exc:
        raise UserError(f"{p}: cannot be read ({exc.strerror or exc})") from None
    return p


def store_errors(func: Callable) -> Callable:
    """Wrap a verb so SQLite's "locked" or "busy" becomes a one-line UserError.

    The store waits 30 s for a writer (a running daemon) before giving up; what earlier
    transactions committed stays committed, and the failed one is rolled back whole.
    """
    @functools.wraps(func)
    def verb(args: argparse.Namespace) -> int:
        try:
            return func(args)
        except sqlite3.OperationalError as exc:
            text = str(exc)
            if "locked" not in text and "busy" not in text:
                raise
            where = getattr(args, "config", None) or "the store"
            raise UserError(f"{where}: the store is busy (another process, such as a running daemon, held "
                            "a write lock for over 30 s); what was committed before stays, nothing is half "
                            "written; try again") from None
    return verb
