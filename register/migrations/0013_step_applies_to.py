# Which devices of a test are asked a step: a subsystem role and, optionally, a device type.
# Existing steps keep both empty, so they are asked as before (register.rules.steps_for).

import django.db.models.deletion
from django.db import migrations, models

ROLES = [("sensing", "Sensing"), ("logic", "Logic solving"), ("final", "Final elements")]
ROLE_HELP = ("The devices this step is asked of: sensors, logic solver or final elements. "
             "Empty, with no device type: read from what the step measures, else every device.")
TYPE_HELP = "Optional: only devices of this type are asked this step."


class Migration(migrations.Migration):

    dependencies = [
        ("register", "0011_deferral_withdrawn"),
    ]

    operations = [
        migrations.AddField(
            model_name="historicalteststep",
            name="applies_to_role",
            field=models.CharField(blank=True, choices=ROLES, default="", help_text=ROLE_HELP,
                                   max_length=10, verbose_name="asked of (role)"),
        ),
        migrations.AddField(
            model_name="historicalteststep",
            name="applies_to_type",
            field=models.ForeignKey(blank=True, db_constraint=False, help_text=TYPE_HELP,
                                    null=True, on_delete=django.db.models.deletion.DO_NOTHING,
                                    related_name="+", to="register.devicetype",
                                    verbose_name="asked of (device type)"),
        ),
        migrations.AddField(
            model_name="teststep",
            name="applies_to_role",
            field=models.CharField(blank=True, choices=ROLES, default="", help_text=ROLE_HELP,
                                   max_length=10, verbose_name="asked of (role)"),
        ),
        migrations.AddField(
            model_name="teststep",
            name="applies_to_type",
            field=models.ForeignKey(blank=True, help_text=TYPE_HELP, null=True,
                                    on_delete=django.db.models.deletion.PROTECT,
                                    related_name="+", to="register.devicetype",
                                    verbose_name="asked of (device type)"),
        ),
    ]
