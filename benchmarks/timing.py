"""Timing shared by the benchmark scripts (imported as ``timing`` when a script runs)."""

from __future__ import annotations

import time
from collections.abc import Callable


def best_time(function: Callable[[], object], repeats: int = 5, warm_up: bool = True) -> float:
    """Fastest of ``repeats`` runs, in seconds (the least disturbed by other work); one untimed
    run first when ``warm_up``."""
    if warm_up:
        function()
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        function()
        times.append(time.perf_counter() - start)
    return min(times)
