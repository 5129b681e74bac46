"""The long-running process's heap: keep the cyclic garbage collector off what lives for ever.

Every full (oldest-generation) collection of CPython's cyclic collector walks every tracked
object. In an alerter process most of them are created once and never die: the imported
modules (numpy, scipy, numba, pydantic, rich: about 83,000 objects), the compiled kernels
and a restored engine. Walking them costs 50-80 ms per full collection on the project's
machine (``benchmarks/bench_tick.py`` prints the figure), and under that benchmark's alert
storm such a collection landed in about one hour in six. Moving them once to the permanent
generation (``gc.freeze``, Python 3.7+) takes them out of every later collection; reference
counting still frees them as usual, only cycles among them would no longer be collected,
so a collection runs first and the freeze happens once, after the process has settled (the
first closed hour: state restored, kernels compiled), not per hour.
"""

from __future__ import annotations

import gc
import time

__all__ = ["settle"]


def settle() -> tuple[int, float]:
    """Collect, then move every object the collector tracks to the permanent generation.

    Returns how many objects are frozen in all and the milliseconds it took. Meant for
    processes that run for hours (``alerter run``); a library caller chooses
    (``Service(settle_heap=...)`` is off by default).
    """
    t0 = time.perf_counter()
    gc.collect()
    gc.freeze()
    return gc.get_freeze_count(), (time.perf_counter() - t0) * 1000
