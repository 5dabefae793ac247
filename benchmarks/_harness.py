"""Registry and timing helpers shared by the benchmark cases."""

from __future__ import annotations

import resource
import statistics
import time
from collections.abc import Callable

# case name -> {"description": str, "unit": str, "variants": {variant: fn(quick) -> (work, seconds)}}
CASES: dict[str, dict] = {}


def case(name: str, *, unit: str, description: str, baseline: str, per: float = 1e6):
    """Register a benchmark case.  Variants are added with the returned object's ``variant`` decorator.

    Every variant returns ``(work, seconds)``: the amount of work done (pixels, rows) and the median time.
    ``baseline`` names the variant the others are compared with.  Throughput is work / seconds / ``per``
    (1e6 for Mpx/s; 1 for rows/s).
    """
    entry = CASES.setdefault(name, {"unit": unit, "description": description, "baseline": baseline,
                                    "per": per, "variants": {}})

    class _Adder:
        @staticmethod
        def variant(label: str):
            def wrap(fn):
                entry["variants"][label] = fn
                return fn

            return wrap

    return _Adder


def peak_rss_mb() -> float:
    """Peak resident set size of this process so far (Linux reports kB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def timed(func: Callable[[], object], repeat: int) -> float:
    """Median wall time of ``repeat`` calls, after one warm-up call (JIT compilation, caches)."""
    func()
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        func()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)
