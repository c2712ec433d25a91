"""PostgreSQL (psycopg 3), with the change chain appended at commit (``register.dbwrap``)."""

from django.db.backends.postgresql import base

from register.dbwrap import ChainOnCommit


class DatabaseWrapper(ChainOnCommit, base.DatabaseWrapper):
    pass
