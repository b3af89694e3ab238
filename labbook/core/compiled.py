"""A query of the ORM compiled once per process and run again with fresh parameters.

For the few queries on every request's path (the bearer-token lookup): building and compiling
a queryset with a join and three EXISTS costs about twice what the database takes to answer
it. The SQL comes from the ORM, so it follows the models; the values come back through the
same compiler's converters, so they are what the ORM would give (aware datetimes on SQLite).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from datetime import datetime
from typing import Any

from django.db import connections
from django.db.models import QuerySet


class CompiledQuery:
    """``build(**placeholders)`` returns a ``.values(...)`` queryset whose parameters include
    each placeholder value once; :meth:`rows` runs its SQL with other values in their place.

    The placeholders must be values no caller passes (they find their parameter's position),
    and datetimes are adapted the way the ORM adapts them for the connection.
    """

    def __init__(
        self, build: Callable[..., QuerySet], placeholders: Mapping[str, Any], *, using="default"
    ) -> None:
        self._build = build
        self._placeholders = dict(placeholders)
        self._using = using
        self._compiled: tuple[Any, str, list, dict[str, int], list[str], str] | None = None

    def _compile(self):
        connection = connections[self._using]
        # Compiled per connection vendor: tests may swap the database under a process.
        if self._compiled is not None and self._compiled[5] == connection.vendor:
            return self._compiled
        queryset = self._build(**self._placeholders)
        query = queryset.query
        compiler = query.get_compiler(using=self._using)
        sql, params = compiler.as_sql()
        params = list(params)
        positions = {}
        for name, value in self._placeholders.items():
            adapted = _adapt(connection, value)
            found = [index for index, param in enumerate(params) if param == adapted]
            if len(found) != 1:
                raise ValueError(f"placeholder {name!r} appears {len(found)} times in the query")
            positions[name] = found[0]
        names = list(query.selected or [])
        if not names:
            names = [*query.extra_select, *query.values_select, *query.annotation_select]
        self._compiled = (compiler, sql, params, positions, names, connection.vendor)
        return self._compiled

    def rows(self, **values: Any) -> list[dict[str, Any]]:
        compiler, sql, params, positions, names, _ = self._compile()
        connection = connections[self._using]
        params = list(params)
        for name, value in values.items():
            params[positions[name]] = _adapt(connection, value)
        with connection.cursor() as cursor:
            cursor.execute(sql, params)
            fetched = cursor.fetchall()
        indexes = range(len(names))
        return [{names[i]: row[i] for i in indexes} for row in compiler.results_iter([fetched])]


def _adapt(connection, value: Any) -> Any:
    if isinstance(value, datetime):
        return connection.ops.adapt_datetimefield_value(value)
    return value
