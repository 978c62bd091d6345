"""Run every ``benchmarks/bench_*.py`` ``main()`` in name order.

A failing benchmark is reported and the rest still run; the exit status is non-zero
if any failed or missed a target (each benchmark prints every target with its measured
figure and raises ``benchmarks.targets.TargetMissed`` on a miss).  ``python -m benchmarks
NAME ...`` runs only the named ones (``predict`` or ``bench_predict``).  A module with
``DEFAULT = False`` (the half-hour soak) runs only when named, or with ``QW_BENCH_ALL=1``.

BLAS runs single-threaded unless ``OPENBLAS_NUM_THREADS`` is already set. Measured on
the two-core machine we share, while other work ran: the 19-year fit took 24.0 s with
OpenBLAS's default threads and 4.9 s with one (its one-year lstsq baseline 6.6 s and
0.4 s), and the prediction's block product 15.9 ms against 9.7 ms.  Oversubscribed
threads also made every timing noisier.
"""
from __future__ import annotations

import importlib
import os
import sys
import time
import traceback
from pathlib import Path


def _names(selected: list[str]) -> list[str]:
    here = Path(__file__).resolve().parent
    names = sorted(p.stem for p in here.glob("bench_*.py"))
    if selected:
        wanted = {s if s.startswith("bench_") else f"bench_{s}" for s in selected}
        unknown = wanted - set(names)
        if unknown:
            raise SystemExit(f"no such benchmark: {', '.join(sorted(unknown))} (have: {', '.join(names)})")
        return [n for n in names if n in wanted]
    if os.environ.get("QW_BENCH_ALL") == "1":
        return names
    return [n for n in names if getattr(importlib.import_module(f"benchmarks.{n}"), "DEFAULT", True)]


def main(argv: list[str] | None = None) -> int:
    from benchmarks.targets import TargetMissed

    failed = []
    print(f"BLAS threads: OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}", flush=True)
    for name in _names(list(sys.argv[1:] if argv is None else argv)):
        print(f"== {name}", flush=True)
        t0 = time.perf_counter()
        try:
            module = importlib.import_module(f"benchmarks.{name}")
            module.main()
        except TargetMissed as exc:
            failed.append(name)
            print(f"-- {name} MISSED: {exc}", flush=True)
        except Exception:  # one failure must not hide the others
            traceback.print_exc()
            failed.append(name)
            print(f"-- {name} FAILED", flush=True)
        else:
            print(f"-- {name} done in {time.perf_counter() - t0:.1f} s", flush=True)
    if failed:
        print(f"failed or missed a target: {', '.join(failed)}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    # before anything imports numpy (the daemon of the latency benchmark inherits it too)
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    sys.exit(main())
