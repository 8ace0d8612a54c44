"""Timing helpers shared by the benchmark scripts (run them as `python scripts/bench_*.py`)."""
import time


def best_time(func, repeats: int) -> float:
    """Shortest wall time of ``repeats`` calls of ``func()``, in seconds (the least disturbed run)."""
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        func()
        times.append(time.perf_counter() - start)
    return min(times)
