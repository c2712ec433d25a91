"""A deferral can be withdrawn: the register closes a pending request once the test it
defers has been done (choices only, no change to the tables)."""

from django.db import migrations, models


class Migration(migrations.Migration):

    dependencies = [
        ('register', '0010_state_changes'),
    ]

    operations = [
        migrations.AlterField(
            model_name='deferral',
            name='status',
            field=models.CharField(choices=[('pending', 'Awaiting decision'), ('approved', 'Approved'), ('rejected', 'Rejected'), ('withdrawn', 'Withdrawn (test done)')], default='pending', max_length=10, verbose_name='status'),
        ),
        migrations.AlterField(
            model_name='historicaldeferral',
            name='status',
            field=models.CharField(choices=[('pending', 'Awaiting decision'), ('approved', 'Approved'), ('rejected', 'Rejected'), ('withdrawn', 'Withdrawn (test done)')], default='pending', max_length=10, verbose_name='status'),
        ),
    ]
