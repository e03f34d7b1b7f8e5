"""Benchmarks run by ``make bench``; they print figures and write docs/benchmarks.md (no timed asserts)."""
