"""The change chain becomes keyed: entry hashes are HMAC-SHA256 with settings.CHAIN_KEY from
now on. Entries already appended keep their plain SHA-256 hash and are marked so (scheme 1);
the checkpoint notes the last of them (``unkeyed_until``) under a seal made with the key, so
no later entry can pass as unkeyed. An index finds each object's newest entry."""

from django.db import migrations, models


def note_unkeyed_entries(apps, schema_editor):
    from register.audit.chain import checkpoint_seal

    ChainEntry = apps.get_model("register", "ChainEntry")
    ChainCheckpoint = apps.get_model("register", "ChainCheckpoint")
    last = ChainEntry.objects.order_by("-seq").values_list("seq", flat=True).first() or 0
    cp, _ = ChainCheckpoint.objects.get_or_create(pk=1)
    cp.unkeyed_until = last
    cp.seal = checkpoint_seal(cp)
    cp.save()


class Migration(migrations.Migration):

    dependencies = [
        ('register', '0018_chain_checkpoint'),
    ]

    operations = [
        migrations.AddField(
            model_name='chaincheckpoint',
            name='seal',
            field=models.CharField(blank=True, max_length=64, verbose_name='seal'),
        ),
        migrations.AddField(
            model_name='chaincheckpoint',
            name='unkeyed_until',
            field=models.PositiveBigIntegerField(default=0, verbose_name='unkeyed entries up to'),
        ),
        # every entry so far: plain SHA-256 (1); from now on keyed (2)
        migrations.AddField(
            model_name='chainentry',
            name='scheme',
            field=models.PositiveSmallIntegerField(choices=[(1, 'SHA-256 (before the chain was keyed)'), (2, 'HMAC-SHA256 with the chain key')], default=1, verbose_name='hash scheme'),
        ),
        migrations.AlterField(
            model_name='chainentry',
            name='scheme',
            field=models.PositiveSmallIntegerField(choices=[(1, 'SHA-256 (before the chain was keyed)'), (2, 'HMAC-SHA256 with the chain key')], default=2, verbose_name='hash scheme'),
        ),
        migrations.AddIndex(
            model_name='chainentry',
            index=models.Index(fields=['model_label', 'object_id', 'seq'], name='register_chain_object_seq'),
        ),
        migrations.RunPython(note_unkeyed_entries, migrations.RunPython.noop),
    ]
