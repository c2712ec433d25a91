"""Database backends of the project: Django's own, with the change chain's entries of a
transaction appended once, just before it commits (``register.audit.chain.flush``), so
the chain's head is locked only for that moment rather than from a transaction's first
change to its end. A transaction rolled back takes its pending entries with it."""

PENDING = "_chain_pending"


class ChainOnCommit:
    """Mixin for a ``DatabaseWrapper``: flush the chain before the commit."""

    def commit(self):
        if self.__dict__.get(PENDING):
            from register.audit.chain import flush

            flush(self.alias)
        super().commit()

    def rollback(self):
        self.__dict__.pop(PENDING, None)
        super().rollback()

    def close(self):
        self.__dict__.pop(PENDING, None)
        super().close()
