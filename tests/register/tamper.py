"""Writing to the database behind the application's back, as someone holding the database
owner's rights could: raw SQL with the table triggers switched off for the statement
(PostgreSQL: ``session_replication_role = replica``, which needs a superuser, as the test
database's user is). On SQLite there are no such triggers to switch off."""

from django.db import connection


def raw(sql: str, params=()) -> int:
    """Run one statement with the triggers off; the number of rows it touched."""
    with connection.cursor() as cur:
        if connection.vendor == "postgresql":
            cur.execute("SET session_replication_role = replica")
        try:
            cur.execute(sql, list(params))
            return cur.rowcount
        finally:
            if connection.vendor == "postgresql":
                cur.execute("SET session_replication_role = origin")
