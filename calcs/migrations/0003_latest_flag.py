from django.db import migrations, models
from django.db.models import OuterRef, Subquery


def mark_newest(apps, schema_editor):
    Assessment = apps.get_model("calcs", "Assessment")
    newest = Assessment.objects.filter(sif_id=OuterRef("sif_id")).order_by(
        "-computed_at", "-id").values("id")[:1]
    Assessment.objects.filter(id=Subquery(newest)).update(latest=True)


class Migration(migrations.Migration):

    dependencies = [
        ("calcs", "0002_observed_verdict"),
    ]

    operations = [
        migrations.AddField(
            model_name="assessment",
            name="latest",
            field=models.BooleanField(default=False, editable=False,
                                      help_text="Set on the newest assessment of each SIF only.",
                                      verbose_name="newest of its SIF"),
        ),
        migrations.RunPython(mark_newest, migrations.RunPython.noop),
        migrations.AddConstraint(
            model_name="assessment",
            constraint=models.UniqueConstraint(condition=models.Q(("latest", True)),
                                               fields=("sif",), name="calcs_assess_one_latest"),
        ),
    ]
