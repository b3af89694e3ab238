from __future__ import annotations

import argparse
import json
import os
import sys
from pathlib import Path


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m labbook.bench", description=__doc__)
    parser.add_argument("names", nargs="*", help="benchmarks to run (default: all)")
    parser.add_argument(
        "--output", help="JSON file for the figures (default: var/bench-results.json)"
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
                goals = []
                if figure.goal_ratio is not None:
                    goals.append(f"≤ {figure.goal_ratio:g}×")
                if figure.goal_value is not None:
                    goals.append(f"≤ {figure.goal_value:g} {figure.unit}")
                goal = f" (goal {', '.join(goals)})" if goals else ""
                print(
                    f"{figure.name:<52} {figure.ratio:7.2f}× floor{goal}  "
                    f"{figure.value:10.4g} {figure.unit} vs {figure.floor:.4g} {figure.unit} "
                    f"({figure.floor_name}){verdict}",
                    flush=True,
                )
    finally:
        teardown_databases(databases, verbosity=0)

    output = Path(args.output or Path(settings.DATA_DIR) / "bench-results.json")
    output.write_text(
        json.dumps(
            {
                "database": settings.DATABASES["default"]["ENGINE"].rsplit(".", 1)[-1],
                "figures": [figure.as_dict() for figure in figures],
            },
            indent=2,
        )
    )
    print(f"figures written to {output}")
    return 1 if any(figure.met is False for figure in figures) else 0


if __name__ == "__main__":
    sys.exit(main())
