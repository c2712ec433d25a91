"""Client keys are unique within a site (one site can neither probe nor pre-claim another
site's keys); existing keys take the site of their SIF. A notice kind for a bypass
awaiting authorisation."""

import django.db.models.deletion
from django.conf import settings
from django.db import migrations, models


def key_sites(apps, schema_editor):
    TestRecord = apps.get_model("register", "TestRecord")
    for pk, site_id in TestRecord.objects.filter(client_key__isnull=False).values_list(
            "pk", "sif__unit__site_id"):
        TestRecord.objects.filter(pk=pk).update(key_site_id=site_id)


class Migration(migrations.Migration):

    dependencies = [
        ('register', '0016_list_indexes'),
        migrations.swappable_dependency(settings.AUTH_USER_MODEL),
    ]

    operations = [
        migrations.RemoveConstraint(
            model_name='testrecord',
            name='register_test_client_key_unique',
        ),
        migrations.AddField(
            model_name='testrecord',
            name='key_site',
            field=models.ForeignKey(blank=True, editable=False, help_text="The site within which the client key is unique (set with the key: one site can neither see nor claim another's keys).", null=True, on_delete=django.db.models.deletion.PROTECT, related_name='+', to='register.site'),
        ),
        migrations.RunPython(key_sites, migrations.RunPython.noop),
        migrations.AlterField(
            model_name='historicaltestrecord',
            name='client_key',
            field=models.CharField(blank=True, help_text='Idempotency key supplied by an external system; unique within a site.', max_length=100, null=True, verbose_name='client key'),
        ),
        migrations.AlterField(
            model_name='notification',
            name='kind',
            field=models.CharField(choices=[('plan_state', 'Test plan state changed'), ('due_soon', 'Proof test due soon'), ('overdue', 'Proof test overdue'), ('escalated', 'Overdue proof test escalated'), ('escalated_2', 'Overdue proof test escalated, second level'), ('bypass_state', 'Bypass over its authorised time'), ('bypass_requested', 'Bypass awaiting authorisation'), ('target', 'SIF no longer meets its target'), ('failure_found', 'Dangerous failure found'), ('countersign', 'Waiting for countersignature'), ('deferral_requested', 'Deferral requested'), ('deferral', 'Deferral decided'), ('deferral_withdrawn', 'Deferral withdrawn')], max_length=20),
        ),
        migrations.AlterField(
            model_name='testrecord',
            name='client_key',
            field=models.CharField(blank=True, help_text='Idempotency key supplied by an external system; unique within a site.', max_length=100, null=True, verbose_name='client key'),
        ),
        migrations.AddConstraint(
            model_name='testrecord',
            constraint=models.UniqueConstraint(condition=models.Q(('client_key__isnull', False)), fields=('key_site', 'client_key'), name='register_test_client_key_per_site'),
        ),
    ]
