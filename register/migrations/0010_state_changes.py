"""State changes as rows: test plan state changes and SIF verdict changes, append-only.

On PostgreSQL a trigger refuses any UPDATE or DELETE of those rows, so raw SQL cannot
rewrite what was announced (as migration 0005 does for signed records); other databases
rely on the model layer. Notification kinds get room for the longer names, and each
notification a headline of its own (the e-mail's subject)."""

import django.db.models.deletion
from django.db import migrations, models

PLAN_STATES = [("on_track", "Not yet due"), ("due_soon", "Due soon"), ("overdue", "Overdue"),
               ("escalated", "Escalated"), ("escalated_2", "Escalated, second level"),
               ("no_plan", "Not scheduled")]
CAUSES = [("scan", "Date passed (periodic scan)"), ("record", "Test record signed or corrected"),
          ("demand", "Real demand recorded"), ("deferral", "Deferral decided"),
          ("plan", "Test plan changed")]
KINDS = [("plan_state", "Test plan state changed"), ("due_soon", "Proof test due soon"),
         ("overdue", "Proof test overdue"), ("escalated", "Overdue proof test escalated"),
         ("escalated_2", "Overdue proof test escalated, second level"),
         ("bypass_state", "Bypass over its authorised time"),
         ("target", "SIF no longer meets its target"),
         ("failure_found", "Dangerous failure found"),
         ("countersign", "Waiting for countersignature"),
         ("deferral_requested", "Deferral requested"), ("deferral", "Deferral decided"),
         ("deferral_withdrawn", "Deferral withdrawn")]

APPEND_ONLY_FN = """
CREATE OR REPLACE FUNCTION register_refuse_state_change_rewrite() RETURNS trigger AS $$
BEGIN
    RAISE EXCEPTION '% rows are append-only: % refused', TG_TABLE_NAME, TG_OP
        USING ERRCODE = 'integrity_constraint_violation';
END;
$$ LANGUAGE plpgsql;
"""
TABLES = [("register_planstatechange", "register_plan_state_change_append_only"),
          ("register_sifverdictchange", "register_verdict_change_append_only")]


def _run(schema_editor, *statements):
    with schema_editor.connection.cursor() as cursor:
        for sql in statements:
            cursor.execute(sql)


def install(apps, schema_editor):
    if schema_editor.connection.vendor != "postgresql":
        return
    _run(schema_editor, APPEND_ONLY_FN)
    for table, name in TABLES:
        _run(schema_editor, f"DROP TRIGGER IF EXISTS {name} ON {table}",
             f"CREATE TRIGGER {name} BEFORE UPDATE OR DELETE ON {table} FOR EACH ROW "
             "EXECUTE FUNCTION register_refuse_state_change_rewrite()")


def remove(apps, schema_editor):
    if schema_editor.connection.vendor != "postgresql":
        return
    for table, name in TABLES:
        _run(schema_editor, f"DROP TRIGGER IF EXISTS {name} ON {table}")
    _run(schema_editor, "DROP FUNCTION IF EXISTS register_refuse_state_change_rewrite()")


class Migration(migrations.Migration):

    dependencies = [
        ("register", "0009_plan_versions_site_time"),
    ]

    operations = [
        migrations.AlterField(
            model_name="notification",
            name="kind",
            field=models.CharField(choices=KINDS, max_length=20),
        ),
        migrations.AddField(
            model_name="notification",
            name="subject",
            field=models.CharField(
                blank=True, max_length=200,
                help_text="The headline, whole: the e-mail's subject and the inbox's title."),
        ),
        migrations.CreateModel(
            name="PlanStateChange",
            fields=[
                ("id", models.BigAutoField(auto_created=True, primary_key=True, serialize=False,
                                           verbose_name="ID")),
                ("from_state", models.CharField(
                    blank=True, choices=PLAN_STATES, max_length=12, verbose_name="from state",
                    help_text="Empty for the first row of a plan (its state when first "
                              "followed).")),
                ("to_state", models.CharField(choices=PLAN_STATES, max_length=12,
                                              verbose_name="to state")),
                ("due_on", models.DateField(blank=True, null=True, verbose_name="due date",
                                            help_text="The due date the new state refers to.")),
                ("from_due_on", models.DateField(blank=True, null=True,
                                                 verbose_name="previous due date")),
                ("at", models.DateTimeField(verbose_name="recorded at")),
                ("cause", models.CharField(choices=CAUSES, max_length=12, verbose_name="cause")),
                ("plan", models.ForeignKey(on_delete=django.db.models.deletion.PROTECT,
                                           related_name="state_changes",
                                           to="register.testplan")),
            ],
            options={
                "verbose_name": "test plan state change",
                "ordering": ["-at", "-id"],
                "indexes": [models.Index(fields=["plan", "-id"], name="register_psc_plan_last")],
                "constraints": [models.UniqueConstraint(
                    fields=("plan", "due_on", "to_state"), nulls_distinct=False,
                    name="register_plan_state_change_once")],
            },
        ),
        migrations.CreateModel(
            name="SifVerdictChange",
            fields=[
                ("id", models.BigAutoField(auto_created=True, primary_key=True, serialize=False,
                                           verbose_name="ID")),
                ("assessment_id", models.BigIntegerField(
                    verbose_name="assessment that made the change")),
                ("previous_assessment_id", models.BigIntegerField(
                    blank=True, null=True, verbose_name="previous assessment")),
                ("from_meets", models.BooleanField(null=True,
                                                   verbose_name="met the target before")),
                ("to_meets", models.BooleanField(null=True, verbose_name="meets the target now")),
                ("at", models.DateTimeField(verbose_name="computed at")),
                ("summary", models.CharField(blank=True, max_length=500,
                                             verbose_name="verdict summary")),
                ("sif", models.ForeignKey(on_delete=django.db.models.deletion.PROTECT,
                                          related_name="verdict_changes",
                                          to="register.safetyfunction")),
            ],
            options={
                "verbose_name": "SIF verdict change",
                "ordering": ["-at", "-id"],
                "constraints": [models.UniqueConstraint(fields=("sif", "assessment_id"),
                                                        name="register_verdict_change_once")],
            },
        ),
        migrations.RunPython(install, remove),
    ]
