# Readings are keyed by (channel, t) instead of a surrogate id, and on PostgreSQL their table
# is partitioned by year (labbook/instruments/partitions.py). No installation holds readings
# yet, so the old table is dropped and the new one created.

import django.db.models.deletion
from django.db import migrations, models

from labbook.instruments.partitions import CreateReadingTable


class Migration(migrations.Migration):
    dependencies = [
        ("instruments", "0001_initial"),
    ]

    operations = [
        migrations.DeleteModel(name="Reading"),
        CreateReadingTable(
            name="Reading",
            fields=[
                (
                    "pk",
                    models.CompositePrimaryKey(
                        "channel_id", "t", blank=True, editable=False, primary_key=True, serialize=False
                    ),
                ),
                (
                    "channel",
                    models.ForeignKey(
                        on_delete=django.db.models.deletion.PROTECT,
                        related_name="readings",
                        to="instruments.channel",
                    ),
                ),
                ("t", models.DateTimeField()),
                ("value", models.FloatField()),
            ],
        ),
    ]
