"""SQLite (the embedded demo), with the change chain appended at commit
(``register.dbwrap``)."""

from django.db.backends.sqlite3 import base

from register.dbwrap import ChainOnCommit


class DatabaseWrapper(ChainOnCommit, base.DatabaseWrapper):
    pass
