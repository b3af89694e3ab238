"""Benchmarks of the cryo app (registered on import by labbook.bench.suites)."""
