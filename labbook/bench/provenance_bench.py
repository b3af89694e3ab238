"""Benchmarks of the provenance app (registered on import by labbook.bench.suites)."""
