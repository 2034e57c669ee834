"""Timing and peak-memory helpers shared by the benchmark scripts, and a plain-text table printer."""

from __future__ import annotations

import gc
import time
import tracemalloc
from collections.abc import Callable, Sequence
from typing import TypeVar

T = TypeVar("T")


def timed(fn: Callable[[], T], *, repeat: int = 1) -> tuple[T, float]:
    """Run ``fn`` ``repeat`` times; the result of the last run and the best time in seconds."""
    best = float("inf")
    result: T
    for _ in range(repeat):
        gc.collect()
        t = time.perf_counter()
        result = fn()
        best = min(best, time.perf_counter() - t)
    return result, best


def peak_memory(fn: Callable[[], object]) -> float:
    """Peak of Python-tracked allocations (numpy arrays included) while ``fn`` runs, in MB.

    Run separately from timing: tracing slows allocation-heavy code.
    """
    gc.collect()
    tracemalloc.start()
    try:
        fn()
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return peak / 2**20


def print_table(header: Sequence[str], rows: Sequence[Sequence[object]]) -> str:
    """Markdown table text (also printed), numbers formatted to three significant figures."""

    def fmt(v: object) -> str:
        if isinstance(v, float):
            return f"{v:.3g}" if abs(v) < 1000 else f"{v:,.0f}"
        return str(v)

    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    lines += ["| " + " | ".join(fmt(v) for v in row) + " |" for row in rows]
    text = "\n".join(lines)
    print(text, flush=True)
    return text
