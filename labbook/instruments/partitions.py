"""The readings table on PostgreSQL: declaratively partitioned by year of ``t``.

Why yearly: the state query walks partitions newest first and stops at the first that holds
a reading (an ordered Append), so the usual lookup touches one partition; time-range queries
prune to the years they cover; and an old year can be detached and archived as one table
(``ALTER TABLE instruments_reading DETACH PARTITION instruments_reading_y2016``). A default
partition catches readings outside the prepared years, so an insert never fails for want of a
partition; ``ensure_partitions`` moves such rows into their year when it creates it.

The primary key (channel_id, t) carries ``INCLUDE (value)``: plot queries for one channel and
a time range are answered from the index alone (a covering index halves them, PERFORMANCE.md).
On SQLite the table is an ordinary one with the same composite key.
"""

from __future__ import annotations

from datetime import UTC, datetime

from django.db import connection as default_connection
from django.db import migrations

TABLE = "instruments_reading"

CREATE_PARTITIONED = f"""
CREATE TABLE {TABLE} (
    channel_id bigint NOT NULL
        REFERENCES instruments_channel (id) DEFERRABLE INITIALLY DEFERRED,
    t timestamp with time zone NOT NULL,
    value double precision NOT NULL,
    CONSTRAINT {TABLE}_pkey PRIMARY KEY (channel_id, t) INCLUDE (value)
) PARTITION BY RANGE (t);
CREATE TABLE {TABLE}_default PARTITION OF {TABLE} DEFAULT;
"""


def partition_name(year: int) -> str:
    return f"{TABLE}_y{year}"


def existing_partitions(connection=None) -> list[str]:
    connection = connection or default_connection
    with connection.cursor() as cursor:
        cursor.execute(
            """
            SELECT child.relname FROM pg_inherits
            JOIN pg_class parent ON parent.oid = pg_inherits.inhparent
            JOIN pg_class child ON child.oid = pg_inherits.inhrelid
            WHERE parent.relname = %s ORDER BY child.relname
            """,
            [TABLE],
        )
        return [row[0] for row in cursor.fetchall()]


def ensure_partitions(first_year: int, last_year: int, connection=None) -> list[str]:
    """Create the yearly partitions first_year..last_year that are missing; returns the new
    ones. Rows already sitting in the default partition for such a year are moved into it."""
    connection = connection or default_connection
    if connection.vendor != "postgresql":
        return []
    present = set(existing_partitions(connection))
    created = []
    for year in range(first_year, last_year + 1):
        name = partition_name(year)
        if name in present:
            continue
        start = datetime(year, 1, 1, tzinfo=UTC)
        end = datetime(year + 1, 1, 1, tzinfo=UTC)
        with connection.cursor() as cursor:
            # A partition cannot be created while the default partition holds rows of its
            # range, so the year is built as a plain table, filled, then attached.
            cursor.execute(f"CREATE TABLE {name} (LIKE {TABLE} INCLUDING DEFAULTS)")
            move_rows = (
                f"WITH moved AS (DELETE FROM {TABLE}_default WHERE t >= %s AND t < %s RETURNING *) "  # noqa: S608
                f"INSERT INTO {name} SELECT * FROM moved"
            )
            cursor.execute(move_rows, [start, end])  # noqa: S608 - table names are ours, not input
            cursor.execute(
                f"ALTER TABLE {TABLE} ATTACH PARTITION {name} FOR VALUES FROM (%s) TO (%s)",
                [start, end],
            )
        created.append(name)
    return created


def ensure_current_partitions(
    connection=None, *, years_back: int = 1, years_ahead: int = 1
) -> list[str]:
    year = datetime.now(UTC).year
    return ensure_partitions(year - years_back, year + years_ahead, connection)


class CreateReadingTable(migrations.CreateModel):
    """CreateModel whose table, on PostgreSQL, is the partitioned one above."""

    def database_forwards(self, app_label, schema_editor, from_state, to_state):
        if schema_editor.connection.vendor != "postgresql":
            return super().database_forwards(app_label, schema_editor, from_state, to_state)
        schema_editor.execute(CREATE_PARTITIONED)
        ensure_current_partitions(schema_editor.connection)
        return None

    def database_backwards(self, app_label, schema_editor, from_state, to_state):
        if schema_editor.connection.vendor != "postgresql":
            return super().database_backwards(app_label, schema_editor, from_state, to_state)
        schema_editor.execute(f"DROP TABLE {TABLE} CASCADE")
        return None
