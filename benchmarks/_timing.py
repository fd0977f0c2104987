"""A wall-clock and CPU timer shared by the benchmark scripts."""
from __future__ import annotations

import time


class Timer:
    """Wall-clock and process CPU seconds of a block (CPU time is steadier on a busy machine)."""

    def __enter__(self):
        self.wall, self.cpu = time.perf_counter(), time.process_time()
        return self

    def __exit__(self, *exc):
        self.wall = time.perf_counter() - self.wall
        self.cpu = time.process_time() - self.cpu

    def __str__(self) -> str:
        return f"{self.wall:8.2f} s wall, {self.cpu:8.2f} s CPU"
