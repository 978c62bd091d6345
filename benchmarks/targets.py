"""Targets of the benchmarks: each is printed with its measured figure and a verdict, and
a benchmark that missed one raises :class:`TargetMissed` when it finishes, so
``python -m benchmarks`` (and ``make bench``) exits non-zero.

Use::

    targets = Targets()
    targets.below("median line-to-email [s]", median, 5.0)
    targets.at_least("speed-up over naive", ratio, 20.0)
    targets.finish()          # raises TargetMissed naming every miss
"""
from __future__ import annotations


class TargetMissed(Exception):
    """A target of a benchmark was missed (the runner reports it and exits non-zero)."""


class Targets:
    """Collects the verdicts of one benchmark."""

    def __init__(self) -> None:
        self.misses: list[str] = []
        self.checked = 0

    def _check(self, label: str, measured: float, op: str, target: float, ok: bool, fmt: str) -> bool:
        self.checked += 1
        verdict = "PASS" if ok else "FAIL"
        print(f"  target: {label} {op} {target:{fmt}}; measured {measured:{fmt}} -> {verdict}", flush=True)
        if not ok:
            self.misses.append(f"{label} {measured:{fmt}} (target {op} {target:{fmt}})")
        return ok

    def below(self, label: str, measured: float, target: float, fmt: str = ".3g") -> bool:
        """``measured < target``."""
        return self._check(label, measured, "<", target, measured < target, fmt)

    def at_most(self, label: str, measured: float, target: float, fmt: str = ".3g") -> bool:
        """``measured <= target``."""
        return self._check(label, measured, "<=", target, measured <= target, fmt)

    def at_least(self, label: str, measured: float, target: float, fmt: str = ".3g") -> bool:
        """``measured >= target``."""
        return self._check(label, measured, ">=", target, measured >= target, fmt)

    def within(self, label: str, measured: float, lo: float, hi: float, fmt: str = ".3g") -> bool:
        """``lo <= measured <= hi``."""
        self.checked += 1
        ok = lo <= measured <= hi
        print(f"  target: {label} within [{lo:{fmt}}, {hi:{fmt}}]; measured {measured:{fmt}} -> "
              f"{'PASS' if ok else 'FAIL'}", flush=True)
        if not ok:
            self.misses.append(f"{label} {measured:{fmt}} (target within [{lo:{fmt}}, {hi:{fmt}}])")
        return ok

    def finish(self) -> None:
        """Raise :class:`TargetMissed` if any target was missed."""
        if self.misses:
            raise TargetMissed("; ".join(self.misses))
