"""Database backends of the project: Django's own, with the change chain's entries of a
transaction appended once, just before it commits (``register.audit.chain.flush``), so
the chain's head is locked only for that moment rather than from a transaction's first
change to its end. A transaction rolled back takes its pending entries with it."""

PENDING = "_chain_pending"

#: The function that appends a connection's pending chain entries, given its alias; set by
#: ``register.audit.chain`` when it is imported (the app's ``ready``), so this module
#: depends on nothing of the register.
_flush = None


def set_flush(function) -> None:
    global _flush
    _flush = function


def flush_pending(alias: str) -> None:
    """Append the pending chain entries of the connection ``alias`` (if any)."""
    if _flush is not None:
        _flush(alias)


FLUSHED = "_chain_flushed"


def note_flushed(conn, items: dict) -> None:
    """Remember entries appended inside savepoints: if one of those savepoints is rolled
    back, its appended entries go with it, so the rows they were for (written before the
    savepoint, and still there) are pending again."""
    if conn.savepoint_ids:
        conn.__dict__.setdefault(FLUSHED, []).append((tuple(conn.savepoint_ids), items))


class ChainOnCommit:
    """Mixin for a ``DatabaseWrapper``: flush the chain before the commit."""

    def commit(self):
        if self.__dict__.get(PENDING):
            flush_pending(self.alias)
        self.__dict__.pop(FLUSHED, None)
        super().commit()

    def rollback(self):
        self.__dict__.pop(PENDING, None)
        self.__dict__.pop(FLUSHED, None)
        super().rollback()

    def savepoint_rollback(self, sid):
        super().savepoint_rollback(sid)
        kept = []
        pending = self.__dict__.setdefault(PENDING, {})
        for savepoints, items in self.__dict__.get(FLUSHED, []):
            if sid in savepoints:  # appended after this savepoint: undone with it
                pending.update(items)
            else:
                kept.append((savepoints, items))
        self.__dict__[FLUSHED] = kept

    def close(self):
        self.__dict__.pop(PENDING, None)
        self.__dict__.pop(FLUSHED, None)
        super().close()
