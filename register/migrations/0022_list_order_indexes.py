from django.db import migrations, models


class Migration(migrations.Migration):
    """Indexes for the lists' default orders."""

    dependencies = [
        ("register", "0021_import_job"),
    ]

    operations = [
        # /api/components/ and the devices of a SIF in their default order
        migrations.AddIndex(
            model_name="component",
            index=models.Index(fields=["subsystem", "tag"], name="register_component_list"),
        ),
        # the lead's deferral page: by status, newest request first
        migrations.AddIndex(
            model_name="deferral",
            index=models.Index(fields=["status", "requested_at"],
                               name="register_deferral_queue"),
        ),
        # /api/evidence-packs/ and the auditor's list of packs in their default order
        migrations.AddIndex(
            model_name="evidencepack",
            index=models.Index(fields=["created_at", "id"], name="register_pack_list"),
        ),
        # the findings page and a SIF's findings in their default order
        migrations.AddIndex(
            model_name="finding",
            index=models.Index(fields=["found_at", "id"], name="register_finding_list"),
        ),
        # one person's inbox /inbox/, newest first
        migrations.AddIndex(
            model_name="notification",
            index=models.Index(fields=["recipient", "created_at", "id"],
                               name="register_notice_inbox"),
        ),
        # /api/sifs/ in its default order (by tag)
        migrations.AddIndex(
            model_name="safetyfunction",
            index=models.Index(fields=["tag", "id"], name="register_sif_list"),
        ),
        # /api/subsystems/ and the SIF page's subsystems in their default order
        migrations.AddIndex(
            model_name="subsystem",
            index=models.Index(fields=["sif", "position", "id"], name="register_subsystem_list"),
        ),
        # /api/test-plans/ and the SIF page's plans in their default order
        migrations.AddIndex(
            model_name="testplan",
            index=models.Index(fields=["sif", "name"], name="register_plan_list"),
        ),
        # the technician's worklist /field/: next due first (ascending, empty last)
        migrations.AddIndex(
            model_name="testplan",
            index=models.Index(fields=["next_due_on"], name="register_plan_worklist"),
        ),
        # the countersign queue /field/verify/: signed records, oldest first
        migrations.AddIndex(
            model_name="testrecord",
            index=models.Index(condition=models.Q(("status", "signed")),
                               fields=["signed_at", "id"], name="register_record_verify_queue"),
        ),
        # the test entry form's steps of a plan, in order
        migrations.AddIndex(
            model_name="teststep",
            index=models.Index(fields=["plan", "position"], name="register_step_order"),
        ),
    ]
