# The operations log: bypasses keep who asked for them apart from who authorised them (and
# when), and who closed them; demands keep their cause; findings track each failure found.
#
# Bypasses entered before this migration named only one person, as "authorised_by": always
# the person who entered the bypass, with no independent check. That person becomes the
# requester and the bypass is left without an authorisation (the register cannot tell
# whether somebody else authorised it); the earlier history row keeps what was recorded.
# A legacy bypass still open therefore waits for a lead's authorisation.

import django.db.models.deletion
import simple_history.models
from django.conf import settings
from django.db import migrations, models


def legacy_bypasses(apps, schema_editor):
    Bypass = apps.get_model("register", "Bypass")
    for b in Bypass.objects.filter(requested_by__isnull=True, authorised_by__isnull=False):
        Bypass.objects.filter(pk=b.pk).update(requested_by_id=b.authorised_by_id,
                                              authorised_by=None, authorised_at=None)


def legacy_bypasses_back(apps, schema_editor):
    Bypass = apps.get_model("register", "Bypass")
    for b in Bypass.objects.filter(authorised_by__isnull=True):
        Bypass.objects.filter(pk=b.pk).update(authorised_by_id=b.requested_by_id)


class Migration(migrations.Migration):

    dependencies = [
        ('register', '0013_step_applies_to'),
        migrations.swappable_dependency(settings.AUTH_USER_MODEL),
    ]

    operations = [
        migrations.CreateModel(
            name='Finding',
            fields=[
                ('id', models.BigAutoField(auto_created=True, primary_key=True, serialize=False, verbose_name='ID')),
                ('source', models.CharField(choices=[('test', 'Test record'), ('demand', 'Real demand or trip')], max_length=10, verbose_name='found by')),
                ('found_at', models.DateTimeField(verbose_name='found at')),
                ('failure_mode', models.CharField(choices=[('du', 'Dangerous, undetected (found by this test)'), ('dd', 'Dangerous, detected by diagnostics'), ('safe', 'Safe failure')], max_length=5, verbose_name='failure')),
                ('description', models.TextField(blank=True, verbose_name='what was found')),
                ('corrective_action', models.TextField(blank=True, verbose_name='corrective work')),
                ('retest_due_on', models.DateField(blank=True, null=True, verbose_name='retest due by')),
                ('status', models.CharField(choices=[('open', 'Open'), ('closed', 'Closed'), ('withdrawn', 'Withdrawn (record corrected)')], default='open', max_length=10, verbose_name='status')),
                ('closed_at', models.DateTimeField(blank=True, null=True, verbose_name='closed at')),
                ('closure_note', models.TextField(blank=True, verbose_name='closure note')),
                ('opened_at', models.DateTimeField(verbose_name='opened at')),
            ],
            options={
                'ordering': ['-found_at', '-id'],
            },
        ),
        migrations.CreateModel(
            name='HistoricalFinding',
            fields=[
                ('id', models.BigIntegerField(auto_created=True, blank=True, db_index=True, verbose_name='ID')),
                ('source', models.CharField(choices=[('test', 'Test record'), ('demand', 'Real demand or trip')], max_length=10, verbose_name='found by')),
                ('found_at', models.DateTimeField(verbose_name='found at')),
                ('failure_mode', models.CharField(choices=[('du', 'Dangerous, undetected (found by this test)'), ('dd', 'Dangerous, detected by diagnostics'), ('safe', 'Safe failure')], max_length=5, verbose_name='failure')),
                ('description', models.TextField(blank=True, verbose_name='what was found')),
                ('corrective_action', models.TextField(blank=True, verbose_name='corrective work')),
                ('retest_due_on', models.DateField(blank=True, null=True, verbose_name='retest due by')),
                ('status', models.CharField(choices=[('open', 'Open'), ('closed', 'Closed'), ('withdrawn', 'Withdrawn (record corrected)')], default='open', max_length=10, verbose_name='status')),
                ('closed_at', models.DateTimeField(blank=True, null=True, verbose_name='closed at')),
                ('closure_note', models.TextField(blank=True, verbose_name='closure note')),
                ('opened_at', models.DateTimeField(verbose_name='opened at')),
                ('history_id', models.AutoField(primary_key=True, serialize=False)),
                ('history_date', models.DateTimeField(db_index=True)),
                ('history_change_reason', models.CharField(max_length=100, null=True)),
                ('history_type', models.CharField(choices=[('+', 'Created'), ('~', 'Changed'), ('-', 'Deleted')], max_length=1)),
            ],
            options={
                'verbose_name': 'historical finding',
                'verbose_name_plural': 'historical findings',
                'ordering': ('-history_date', '-history_id'),
                'get_latest_by': ('history_date', 'history_id'),
            },
            bases=(simple_history.models.HistoricalChanges, models.Model),
        ),
        migrations.AddField(
            model_name='bypass',
            name='authorised_at',
            field=models.DateTimeField(blank=True, null=True, verbose_name='authorised at'),
        ),
        migrations.AddField(
            model_name='bypass',
            name='closed_by',
            field=models.ForeignKey(blank=True, null=True, on_delete=django.db.models.deletion.PROTECT, related_name='closed_bypasses', to=settings.AUTH_USER_MODEL),
        ),
        migrations.AddField(
            model_name='bypass',
            name='requested_by',
            field=models.ForeignKey(help_text='Who put the bypass in place and asked for it (empty only for rows written in bulk).', null=True, on_delete=django.db.models.deletion.PROTECT, related_name='requested_bypasses', to=settings.AUTH_USER_MODEL),
        ),
        migrations.AddField(
            model_name='demand',
            name='cause',
            field=models.CharField(choices=[('process_upset', 'Process upset'), ('equipment', 'Failure of other plant equipment or the control system'), ('operator', 'Operator action or error'), ('external', 'External event (utilities, weather)'), ('instrument', 'Fault of a SIF device (transmitter, wiring, valve)'), ('maintenance', 'Maintenance or testing activity'), ('unknown', 'Not known yet'), ('not_recorded', 'Not recorded')], default='not_recorded', help_text='What called for the trip (a real demand) or set it off (a spurious trip).', max_length=15, verbose_name='cause'),
        ),
        migrations.AddField(
            model_name='historicalbypass',
            name='authorised_at',
            field=models.DateTimeField(blank=True, null=True, verbose_name='authorised at'),
        ),
        migrations.AddField(
            model_name='historicalbypass',
            name='closed_by',
            field=models.ForeignKey(blank=True, db_constraint=False, null=True, on_delete=django.db.models.deletion.DO_NOTHING, related_name='+', to=settings.AUTH_USER_MODEL),
        ),
        migrations.AddField(
            model_name='historicalbypass',
            name='requested_by',
            field=models.ForeignKey(blank=True, db_constraint=False, help_text='Who put the bypass in place and asked for it (empty only for rows written in bulk).', null=True, on_delete=django.db.models.deletion.DO_NOTHING, related_name='+', to=settings.AUTH_USER_MODEL),
        ),
        migrations.AddField(
            model_name='historicaldemand',
            name='cause',
            field=models.CharField(choices=[('process_upset', 'Process upset'), ('equipment', 'Failure of other plant equipment or the control system'), ('operator', 'Operator action or error'), ('external', 'External event (utilities, weather)'), ('instrument', 'Fault of a SIF device (transmitter, wiring, valve)'), ('maintenance', 'Maintenance or testing activity'), ('unknown', 'Not known yet'), ('not_recorded', 'Not recorded')], default='not_recorded', help_text='What called for the trip (a real demand) or set it off (a spurious trip).', max_length=15, verbose_name='cause'),
        ),
        migrations.AlterField(
            model_name='bypass',
            name='authorised_by',
            field=models.ForeignKey(blank=True, null=True, on_delete=django.db.models.deletion.PROTECT, related_name='authorised_bypasses', to=settings.AUTH_USER_MODEL),
        ),
        migrations.AlterField(
            model_name='bypass',
            name='authorised_hours',
            field=models.FloatField(help_text='Asked for by the requester, authorised as asked; more than 0 and at most 720 h.', verbose_name='authorised duration (h)'),
        ),
        migrations.AlterField(
            model_name='historicalbypass',
            name='authorised_hours',
            field=models.FloatField(help_text='Asked for by the requester, authorised as asked; more than 0 and at most 720 h.', verbose_name='authorised duration (h)'),
        ),
        migrations.AlterField(
            model_name='bypass',
            name='reason',
            field=models.TextField(error_messages={'blank': 'Say why the SIF is bypassed.'}, verbose_name='reason'),
        ),
        migrations.AlterField(
            model_name='historicalbypass',
            name='reason',
            field=models.TextField(error_messages={'blank': 'Say why the SIF is bypassed.'}, verbose_name='reason'),
        ),
        migrations.RunPython(legacy_bypasses, legacy_bypasses_back),
        migrations.AddConstraint(
            model_name='bypass',
            constraint=models.CheckConstraint(condition=models.Q(('authorised_hours__gt', 0), ('authorised_hours__lte', 720.0)), name='register_bypass_authorised_hours_range'),
        ),
        migrations.AddConstraint(
            model_name='bypass',
            constraint=models.CheckConstraint(condition=models.Q(('authorised_by__isnull', True), ('requested_by__isnull', True), models.Q(('authorised_by', models.F('requested_by')), _negated=True), _connector='OR'), name='register_bypass_authoriser_not_requester'),
        ),
        migrations.AddField(
            model_name='finding',
            name='closed_by',
            field=models.ForeignKey(blank=True, null=True, on_delete=django.db.models.deletion.PROTECT, related_name='closed_findings', to=settings.AUTH_USER_MODEL),
        ),
        migrations.AddField(
            model_name='finding',
            name='component',
            field=models.ForeignKey(on_delete=django.db.models.deletion.PROTECT, related_name='findings', to='register.component'),
        ),
        migrations.AddField(
            model_name='finding',
            name='demand',
            field=models.ForeignKey(blank=True, help_text='The demand or trip on which the device failed.', null=True, on_delete=django.db.models.deletion.PROTECT, related_name='findings', to='register.demand'),
        ),
        migrations.AddField(
            model_name='finding',
            name='owner',
            field=models.ForeignKey(blank=True, help_text='Who sees the follow-up through.', null=True, on_delete=django.db.models.deletion.PROTECT, related_name='owned_findings', to=settings.AUTH_USER_MODEL),
        ),
        migrations.AddField(
            model_name='finding',
            name='result',
            field=models.ForeignKey(blank=True, help_text='The test result that found the failure.', null=True, on_delete=django.db.models.deletion.PROTECT, related_name='findings', to='register.componentresult'),
        ),
        migrations.AddField(
            model_name='finding',
            name='retest',
            field=models.ForeignKey(blank=True, help_text='The signed passing retest that closed it.', null=True, on_delete=django.db.models.deletion.PROTECT, related_name='retested_findings', to='register.testrecord'),
        ),
        migrations.AddField(
            model_name='finding',
            name='sif',
            field=models.ForeignKey(on_delete=django.db.models.deletion.PROTECT, related_name='findings', to='register.safetyfunction'),
        ),
        migrations.AddField(
            model_name='historicalfinding',
            name='closed_by',
            field=models.ForeignKey(blank=True, db_constraint=False, null=True, on_delete=django.db.models.deletion.DO_NOTHING, related_name='+', to=settings.AUTH_USER_MODEL),
        ),
        migrations.AddField(
            model_name='historicalfinding',
            name='component',
            field=models.ForeignKey(blank=True, db_constraint=False, null=True, on_delete=django.db.models.deletion.DO_NOTHING, related_name='+', to='register.component'),
        ),
        migrations.AddField(
            model_name='historicalfinding',
            name='demand',
            field=models.ForeignKey(blank=True, db_constraint=False, help_text='The demand or trip on which the device failed.', null=True, on_delete=django.db.models.deletion.DO_NOTHING, related_name='+', to='register.demand'),
        ),
        migrations.AddField(
            model_name='historicalfinding',
            name='history_user',
            field=models.ForeignKey(null=True, on_delete=django.db.models.deletion.SET_NULL, related_name='+', to=settings.AUTH_USER_MODEL),
        ),
        migrations.AddField(
            model_name='historicalfinding',
            name='owner',
            field=models.ForeignKey(blank=True, db_constraint=False, help_text='Who sees the follow-up through.', null=True, on_delete=django.db.models.deletion.DO_NOTHING, related_name='+', to=settings.AUTH_USER_MODEL),
        ),
        migrations.AddField(
            model_name='historicalfinding',
            name='result',
            field=models.ForeignKey(blank=True, db_constraint=False, help_text='The test result that found the failure.', null=True, on_delete=django.db.models.deletion.DO_NOTHING, related_name='+', to='register.componentresult'),
        ),
        migrations.AddField(
            model_name='historicalfinding',
            name='retest',
            field=models.ForeignKey(blank=True, db_constraint=False, help_text='The signed passing retest that closed it.', null=True, on_delete=django.db.models.deletion.DO_NOTHING, related_name='+', to='register.testrecord'),
        ),
        migrations.AddField(
            model_name='historicalfinding',
            name='sif',
            field=models.ForeignKey(blank=True, db_constraint=False, null=True, on_delete=django.db.models.deletion.DO_NOTHING, related_name='+', to='register.safetyfunction'),
        ),
        migrations.AddIndex(
            model_name='finding',
            index=models.Index(fields=['status', 'found_at'], name='register_fi_status_11854b_idx'),
        ),
        migrations.AddConstraint(
            model_name='finding',
            constraint=models.CheckConstraint(condition=models.Q(models.Q(('result__isnull', False), ('demand__isnull', True)), models.Q(('result__isnull', True), ('demand__isnull', False)), _connector='OR'), name='register_finding_one_source'),
        ),
        migrations.AddConstraint(
            model_name='finding',
            constraint=models.UniqueConstraint(condition=models.Q(('result__isnull', False)), fields=('result',), name='register_finding_once_per_result'),
        ),
        migrations.AddConstraint(
            model_name='finding',
            constraint=models.UniqueConstraint(condition=models.Q(('demand__isnull', False)), fields=('demand', 'component'), name='register_finding_once_per_demand_device'),
        ),
        migrations.AddConstraint(
            model_name='finding',
            constraint=models.CheckConstraint(condition=models.Q(('status', 'open'), ('closed_at__isnull', False), _connector='OR'), name='register_finding_closed_has_time'),
        ),
        migrations.AddConstraint(
            model_name='finding',
            constraint=models.CheckConstraint(condition=models.Q(models.Q(('status', 'closed'), _negated=True), ('retest__isnull', False), models.Q(('closure_note', ''), _negated=True), _connector='OR'), name='register_finding_closed_has_evidence'),
        ),
    ]
