# On PostgreSQL the database itself refuses overlapping mounting periods, of one instrument and
# of one tip, so two chamber PCs mounting at the same instant cannot both succeed (the actions
# check first and give the clear error; this is the backstop, answered 409 by the API).
#
# The key is a one-point range, int8range(id, id, '[]'), rather than "instrument_id WITH =":
# ranges have a GiST operator class built in, so no extension (btree_gist) is needed. The
# period is tstzrange(start, end, '[)'): half-open, and a NULL end (still mounted) is unbounded.
# SQLite has no exclusion constraints; there the partial unique constraints on open mounts and
# the actions' checks (SQLite runs one writer at a time) hold the rule.

from django.db import migrations

CONSTRAINTS = {
    "tipmount_no_overlap_on_instrument": "instrument_id",
    "tipmount_no_overlap_of_tip": "tip_id",
}


def add_exclusions(apps, schema_editor):
    if schema_editor.connection.vendor != "postgresql":
        return
    for name, column in CONSTRAINTS.items():
        schema_editor.execute(
            f"ALTER TABLE tips_tipmount ADD CONSTRAINT {name} EXCLUDE USING gist ("
            f"int8range({column}, {column}, '[]') WITH &&, "
            "tstzrange(start, \"end\", '[)') WITH &&"
            ") WHERE (retired_at IS NULL)"
        )


def drop_exclusions(apps, schema_editor):
    if schema_editor.connection.vendor != "postgresql":
        return
    for name in CONSTRAINTS:
        schema_editor.execute(f"ALTER TABLE tips_tipmount DROP CONSTRAINT IF EXISTS {name}")


class Migration(migrations.Migration):
    dependencies = [
        ("tips", "0001_initial"),
    ]

    operations = [migrations.RunPython(add_exclusions, drop_exclusions)]
