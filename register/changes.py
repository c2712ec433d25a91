"""What a change history entry changed, in one wording for the SIF page and the packs."""

from __future__ import annotations

#: Columns of a historical row that describe the history itself, not the record.
HISTORY_COLUMNS = frozenset({"history_id", "history_date", "history_change_reason",
                             "history_type", "history_user_id"})


def _shown(value) -> str:
    if value is None or value == "":
        return "-"
    if isinstance(value, float):
        return format(value, "g")
    return str(value)


def row_of(history_record) -> dict:
    """The stored columns of a historical row, by attribute name."""
    return {f.attname: getattr(history_record, f.attname)
            for f in history_record._meta.concrete_fields}


def field_changes(before: dict | None, after: dict) -> list[str]:
    """``field: old → new`` for every record column that differs between two historical
    rows of one object (field names as stored, ``_id`` dropped from references);
    ``["created"]`` when there is no earlier row."""
    if before is None:
        return ["created"]
    out = []
    for name, new in after.items():
        if name in HISTORY_COLUMNS or before.get(name) == new:
            continue
        label = name[:-3] if name.endswith("_id") else name
        out.append(f"{label}: {_shown(before.get(name))} → {_shown(new)}")
    return out


def attribute(instance, user, reason: str = "", at=None):
    """Make the history entry of the next save of ``instance`` name the actor and the reason,
    and, when ``at`` is given, the moment the change happened (django-simple-history reads
    ``_history_user``, ``_change_reason`` and ``_history_date``)."""
    instance._history_user = user
    if reason:
        instance._change_reason = reason[:100]
    if at is not None:
        instance._history_date = at
    return instance
