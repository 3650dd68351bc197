"""Small timing harness shared by the benchmark cases.

A case is a function ``case(smoke: bool) -> list[Row]`` registered with
``@case("section")``; ``benchmarks/run.py`` runs them all and writes
``benchmarks/results.md``.
"""

from __future__ import annotations

import os
import platform
import time
from dataclasses import dataclass, field

CASES: list[tuple[str, callable]] = []
NOTES: list[str] = []


def case(section: str):
    def deco(fn):
        CASES.append((section, fn))
        return fn
    return deco


def note(text: str) -> None:
    """A sentence for the notes under the results table (how a case was measured)."""
    NOTES.append(text)


@dataclass
class Row:
    name: str
    mvkde_s: float
    reference: str = ""
    reference_s: float = float("nan")
    max_error: float = float("nan")      # max |mvkde - reference| / peak
    target: str = ""
    notes: str = ""
    extra: dict = field(default_factory=dict)
    met: bool | None = None              # target met (True), missed (False), not judged (None)

    @property
    def ratio(self) -> float:
        return self.reference_s / self.mvkde_s if self.mvkde_s > 0 else float("nan")


def best_of(fn, repeat: int = 3) -> tuple[float, object]:
    """Minimum wall time over ``repeat`` calls, and the last result."""
    best, out = float("inf"), None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def single_thread():
    """Context in which BLAS and OpenMP pools use one thread (threadpoolctl), so that
    mvkde and a reference library compare as one process each."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # without it, OMP_NUM_THREADS=1 etc. in the environment do the same
        import contextlib
        return contextlib.nullcontext()
    return threadpool_limits(limits=1)


def cores() -> int:
    """CPU cores this process may use (the affinity mask where the OS has one)."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:
        return os.cpu_count() or 1


def machine() -> str:
    return (f"{platform.processor() or platform.machine()}, {cores()} cores available "
            f"({os.cpu_count()} logical CPUs), Python {platform.python_version()}")
