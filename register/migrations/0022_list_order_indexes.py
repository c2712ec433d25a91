from django.db import migrations


class Migration(migrations.Migration):
    """Indexes for the lists' default orders."""

    dependencies = [
        ("register", "0021_import_job"),
    ]

    operations = []
