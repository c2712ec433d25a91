"""pg_dump of the test database, pg_restore into a fresh database, and checks there."""

import datetime as dt
import importlib.util
import os
import shutil
import subprocess
import sys
import uuid
from pathlib import Path

import psycopg
import pytest
from django.db import connection
from django.utils import timezone

from register import choices, services
from register.models import Component, ComponentResult, SafetyFunction, TestRecord
from tests import factories as f
from tests.conftest import need

ROOT = Path(__file__).resolve().parents[2]

pytestmark = [pytest.mark.services, pytest.mark.django_db(transaction=True)]


def _url(name: str) -> str:
    s = connection.settings_dict
    auth = s["USER"] + (f":{s['PASSWORD']}" if s.get("PASSWORD") else "")
    return f"postgresql://{auth}@{s['HOST'] or '127.0.0.1'}:{s['PORT'] or 5432}/{name}"


def test_dump_restore_into_fresh_database_keeps_signed_records(tmp_path):
    need(connection.vendor == "postgresql", "PostgreSQL not configured (set DATABASE_URL)")
    need(bool(shutil.which("pg_dump") and shutil.which("pg_restore")), "pg_dump not installed")
    site = f.site("harbour")
    tech = f.user("tech", site=site, role=choices.Role.TECHNICIAN)
    sif = f.sif(f.unit(site), tag="SIF-H-1")
    comp = Component.objects.filter(subsystem__sif=sif).first()
    rec = services.save_draft(user=tech, sif=sif, kind=choices.TestKind.FULL,
                              performed_at=timezone.now() - dt.timedelta(days=1),
                              remarks="Trip at 85 %",
                              results=[services.ResultInput(component=comp, as_found="pass",
                                                            as_left="pass")])
    services.sign_record(rec, tech, f.PASSWORD)
    rec.refresh_from_db()
    counts = {m._meta.db_table: m.objects.count()
              for m in (SafetyFunction, TestRecord, ComponentResult, Component)}

    dump = tmp_path / "ledger.dump"
    source = _url(connection.settings_dict["NAME"])
    subprocess.run(["pg_dump", "--format=custom", "--no-owner", f"--file={dump}", source],
                   check=True)
    fresh = f"restore_{uuid.uuid4().hex[:8]}"
    with psycopg.connect(_url("postgres"), autocommit=True) as admin:
        admin.execute(f'CREATE DATABASE "{fresh}"')
    try:
        subprocess.run(["pg_restore", "--no-owner", "--exit-on-error",
                        f"--dbname={_url(fresh)}", str(dump)], check=True)
        with psycopg.connect(_url(fresh)) as conn:
            for table, n in counts.items():
                assert conn.execute(f"SELECT count(*) FROM {table}").fetchone()[0] == n
            row = conn.execute(
                "SELECT status, remarks, performed_by_name, signed_at, performed_at "
                "FROM register_testrecord WHERE id = %s", (rec.pk,)).fetchone()
            assert row == ("signed", "Trip at 85 %", rec.performed_by_name, rec.signed_at,
                           rec.performed_at)
        env = {**os.environ, "DATABASE_URL": _url(fresh).replace("postgresql://", "postgres://"),
               "DJANGO_SETTINGS_MODULE": "config.settings.test",
               "SIF_LEDGER_VAR_DIR": str(tmp_path)}
        check = subprocess.run([sys.executable, "manage.py", "migrate", "--check"], env=env,
                               cwd=ROOT, capture_output=True, text=True)
        assert check.returncode == 0, check.stdout + check.stderr
        if importlib.util.find_spec("register.audit.chain") is not None:
            # The hash chain of the change history must verify on the restored copy.
            code = ("import django; django.setup(); from register.audit.chain import verify_chain; "
                    "r = verify_chain(); print(r); raise SystemExit(0 if r.ok else 1)")
            chain = subprocess.run([sys.executable, "-c", code], env=env, cwd=ROOT,
                                   capture_output=True, text=True)
            assert chain.returncode == 0, chain.stdout + chain.stderr
    finally:
        with psycopg.connect(_url("postgres"), autocommit=True) as admin:
            admin.execute(f'DROP DATABASE IF EXISTS "{fresh}" WITH (FORCE)')
