"""On PostgreSQL, the database itself refuses changes to a signed test record and to
everything that belongs to it (results, measurements, attachments), so a raw SQL write
cannot bypass the model layer. The verifier's countersignature (status signed -> verified
with verifier and time) stays allowed. Other databases rely on the model layer."""

from django.db import migrations

SIGNED_FIELDS = ("sif_id", "plan_id", "kind", "performed_at", "performed_by_id",
                 "performed_by_name", "signed_at", "supersedes_id", "correction_reason",
                 "remarks", "client_key")

RECORD_FN = """
CREATE OR REPLACE FUNCTION register_refuse_signed_record_change() RETURNS trigger AS $$
BEGIN
    IF TG_OP = 'DELETE' THEN
        IF OLD.status <> 'draft' THEN
            RAISE EXCEPTION 'test record % is signed and cannot be deleted', OLD.id
                USING ERRCODE = 'integrity_constraint_violation';
        END IF;
        RETURN OLD;
    END IF;
    IF OLD.status = 'draft' THEN
        RETURN NEW;
    END IF;
    IF NEW.status = 'draft' OR ({changed}) THEN
        RAISE EXCEPTION 'test record % is signed and cannot be changed; record a correction',
            OLD.id USING ERRCODE = 'integrity_constraint_violation';
    END IF;
    IF OLD.status = 'verified' AND (NEW.status <> 'verified'
            OR NEW.verified_by_id IS DISTINCT FROM OLD.verified_by_id
            OR NEW.verified_at IS DISTINCT FROM OLD.verified_at) THEN
        RAISE EXCEPTION 'test record % is verified and cannot be changed', OLD.id
            USING ERRCODE = 'integrity_constraint_violation';
    END IF;
    RETURN NEW;
END;
$$ LANGUAGE plpgsql;
""".format(changed=" OR ".join(f"NEW.{f} IS DISTINCT FROM OLD.{f}" for f in SIGNED_FIELDS))

PART_FN = """
CREATE OR REPLACE FUNCTION register_refuse_signed_part_change() RETURNS trigger AS $$
DECLARE
    rid bigint;
    st text;
BEGIN
    IF TG_TABLE_NAME = 'register_measuredvalue' THEN
        SELECT record_id INTO rid FROM register_componentresult
            WHERE id = (CASE WHEN TG_OP = 'DELETE' THEN OLD.result_id ELSE NEW.result_id END);
    ELSIF TG_OP = 'DELETE' THEN
        rid := OLD.record_id;
    ELSE
        rid := NEW.record_id;
    END IF;
    SELECT status INTO st FROM register_testrecord WHERE id = rid;
    IF st IS NOT NULL AND st <> 'draft' THEN
        RAISE EXCEPTION 'test record % is signed: its % rows cannot be changed', rid,
            TG_TABLE_NAME USING ERRCODE = 'integrity_constraint_violation';
    END IF;
    IF TG_OP = 'UPDATE' THEN
        IF TG_TABLE_NAME = 'register_measuredvalue' THEN
            SELECT record_id INTO rid FROM register_componentresult WHERE id = OLD.result_id;
        ELSE
            rid := OLD.record_id;
        END IF;
        SELECT status INTO st FROM register_testrecord WHERE id = rid;
        IF st IS NOT NULL AND st <> 'draft' THEN
            RAISE EXCEPTION 'test record % is signed: its rows cannot be moved', rid
                USING ERRCODE = 'integrity_constraint_violation';
        END IF;
    END IF;
    IF TG_OP = 'DELETE' THEN
        RETURN OLD;
    END IF;
    RETURN NEW;
END;
$$ LANGUAGE plpgsql;
"""

TRIGGERS = [
    ("register_testrecord", "register_signed_record_guard",
     "register_refuse_signed_record_change", "UPDATE OR DELETE"),
    ("register_componentresult", "register_signed_result_guard",
     "register_refuse_signed_part_change", "INSERT OR UPDATE OR DELETE"),
    ("register_measuredvalue", "register_signed_measurement_guard",
     "register_refuse_signed_part_change", "INSERT OR UPDATE OR DELETE"),
    ("register_attachment", "register_signed_attachment_guard",
     "register_refuse_signed_part_change", "INSERT OR UPDATE OR DELETE"),
]


def _run(schema_editor, *statements):
    # no parameters: the functions' RAISE messages use % placeholders of their own
    with schema_editor.connection.cursor() as cursor:
        for sql in statements:
            cursor.execute(sql)


def install(apps, schema_editor):
    if schema_editor.connection.vendor != "postgresql":
        return
    _run(schema_editor, RECORD_FN, PART_FN)
    for table, name, fn, ops in TRIGGERS:
        _run(schema_editor, f"DROP TRIGGER IF EXISTS {name} ON {table}",
             f"CREATE TRIGGER {name} BEFORE {ops} ON {table} FOR EACH ROW EXECUTE FUNCTION "
             f"{fn}()")


def remove(apps, schema_editor):
    if schema_editor.connection.vendor != "postgresql":
        return
    for table, name, _fn, _ops in TRIGGERS:
        _run(schema_editor, f"DROP TRIGGER IF EXISTS {name} ON {table}")
    _run(schema_editor, "DROP FUNCTION IF EXISTS register_refuse_signed_record_change()",
         "DROP FUNCTION IF EXISTS register_refuse_signed_part_change()")


class Migration(migrations.Migration):
    dependencies = [("register", "0004_observed_verdict")]
    operations = [migrations.RunPython(install, remove)]
