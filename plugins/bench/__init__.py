"""Benchmarks: loaded on demand by ``grainhabit bench`` (never by a run or a worker)."""
