from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m labbook.bench", description=__doc__)
    parser.add_argument("names", nargs="*", help="benchmarks to run (default: all)")
    parser.add_argument(
        "--output",
        help="JSON file for the figures (default: var/bench/latest.json, also copied to "
        "var/bench-results.json)",
    )
    args = parser.parse_args(argv)

    os.environ.setdefault("DJANGO_SETTINGS_MODULE", "labbook.settings")
    import django

    django.setup()
    from django.conf import settings
    from django.test.utils import setup_databases, setup_test_environment, teardown_databases

    from labbook.bench import (
        registry,
        suites,  # noqa: F401 - registers the benchmarks
        write_figures,
    )

    names = args.names or list(registry)
    unknown = sorted(set(names) - set(registry))
    if unknown:
        parser.error(f"unknown benchmark(s) {', '.join(unknown)}; known: {', '.join(registry)}")

    setup_test_environment()
    databases = setup_databases(verbosity=0, interactive=False, serialized_aliases=set())
    figures = []
    try:
        for name in names:
            for figure in registry[name]():
                figures.append(figure)
                verdict = "" if figure.met is None else ("  ok" if figure.met else "  ABOVE GOAL")
                goal = f" (goal {figure.goal})" if figure.goal else ""
                print(
                    f"{figure.name:<52} {figure.ratio:7.2f}× floor{goal}  "
                    f"{figure.value:10.4g} {figure.unit} vs {figure.floor:.4g} {figure.unit} "
                    f"({figure.floor_name}){verdict}",
                    flush=True,
                )
    finally:
        teardown_databases(databases, verbosity=0)

    database = settings.DATABASES["default"]["ENGINE"].rsplit(".", 1)[-1]
    outputs = (
        [Path(args.output)]
        if args.output
        else [
            Path(settings.DATA_DIR) / "bench" / "latest.json",
            # The path README and DEVELOPERS name; kept so their instructions stay right.
            Path(settings.DATA_DIR) / "bench-results.json",
        ]
    )
    for output in outputs:
        write_figures(output, figures, database=database, benchmarks=names)
    output = ", ".join(map(str, outputs))
    print(f"figures written to {output}")
    return 1 if any(figure.met is False for figure in figures) else 0


if __name__ == "__main__":
    sys.exit(main())
