"""On PostgreSQL, the database itself refuses to change or delete a change chain entry, so a
raw SQL write cannot rewrite the chain in place (the model layer already refuses:
``register.models.audit``). Appending stays allowed. TRUNCATE (the database owner's
emptying of whole tables, as a test run's flush does) is not refused: a chain cut that way
shows against its anchors. Other databases rely on the model layer and on verification."""

from django.db import migrations

FORWARD = """
CREATE OR REPLACE FUNCTION register_refuse_chain_entry_change() RETURNS trigger AS $$
BEGIN
    RAISE EXCEPTION 'change chain entry #% cannot be changed or deleted: the chain is append-only',
        OLD.seq USING ERRCODE = 'integrity_constraint_violation';
END;
$$ LANGUAGE plpgsql;
CREATE TRIGGER register_chain_entry_append_only
    BEFORE UPDATE OR DELETE ON register_chainentry
    FOR EACH ROW EXECUTE FUNCTION register_refuse_chain_entry_change();
"""

BACKWARD = """
DROP TRIGGER IF EXISTS register_chain_entry_append_only ON register_chainentry;
DROP FUNCTION IF EXISTS register_refuse_chain_entry_change();
"""


def forward(apps, schema_editor):
    if schema_editor.connection.vendor == "postgresql":
        schema_editor.execute(FORWARD, params=None)


def backward(apps, schema_editor):
    if schema_editor.connection.vendor == "postgresql":
        schema_editor.execute(BACKWARD, params=None)


class Migration(migrations.Migration):

    dependencies = [
        ("register", "0019_keyed_chain"),
    ]

    operations = [migrations.RunPython(forward, backward)]
