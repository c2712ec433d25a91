"""The register's live rows against the change history the chain covers.

The chain proves the history has not been rewritten; this proves the live tables still
say what the history says. Each live row of the models in :data:`LIVE_CHECKED` is compared,
field by field (the fields the history keeps), with its latest chained historical row (the
row named by the object's newest chain entry). Named, per row and field:

* a live row whose value differs from that historical row (written behind the
  application's back, for example with raw SQL);
* a live row the history does not know, or knows as deleted;
* an object whose live row is gone while its latest historical row is not a deletion;
* an attachment whose stored file no longer has the SHA-256 recorded at upload, or is
  missing (:func:`register.audit.chain.attachment_altered`).

Not compared: columns the history excludes (values derived from the records, such as a
test plan's due dates) and many-to-many links (kept in tables of their own).
"""

from __future__ import annotations

from dataclasses import dataclass

from django.apps import apps
from django.db import connection

from register.audit.chain import attachment_altered
from register.models import ChainEntry

#: Live models compared with their history: test records and everything in them, operation
#: (demands, bypasses, deferrals) and the design (SIF, subsystem, component, test plan).
LIVE_CHECKED = (
    "register.TestRecord", "register.ComponentResult", "register.MeasuredValue",
    "register.Attachment", "register.Demand", "register.Bypass", "register.Deferral",
    "register.SafetyFunction", "register.Subsystem", "register.Component",
    "register.TestPlan",
)

#: How many problems a result names; further ones are only counted.
LISTED = 100


@dataclass
class LiveBreak:
    model: str  # the live model's label, e.g. register.ComponentResult
    object_id: str
    field: str | None  # None: the whole row
    kind: str  # changed outside history / not in history / deleted outside history / ...
    detail: str

    def __str__(self):
        where = f"{self.model} {self.object_id}" + (f" field {self.field}" if self.field
                                                    else "")
        return f"{where}: {self.kind}. {self.detail}"


def _short(value) -> str:
    text = repr(value)
    return text if len(text) <= 80 else text[:77] + "..."


def _sql(model):
    """Two queries for ``model``: live rows that differ from their latest chained history
    row (or have none, or one recording a deletion), and chained objects whose live row is
    gone. Only the rows with a problem come back; the comparison runs in the database."""
    q = connection.ops.quote_name
    history = model.history.model
    pk = model._meta.pk
    kept = {f.attname: f.column for f in history._meta.concrete_fields}
    fields = [(f.attname, f.column, kept[f.attname]) for f in model._meta.concrete_fields
              if f.attname in kept and not f.primary_key]
    differs = "IS DISTINCT FROM" if connection.vendor == "postgresql" else "IS NOT"
    entries = q(ChainEntry._meta.db_table)
    latest = (f"SELECT e.object_id, e.history_id FROM {entries} e JOIN ("
              f"SELECT object_id, MAX(seq) AS seq FROM {entries} WHERE model_label = %s "
              f"GROUP BY object_id) m ON m.seq = e.seq")
    live, hist = q(model._meta.db_table), q(history._meta.db_table)
    cols = ", ".join(f"l.{q(c)}, h.{q(hc)}" for _, c, hc in fields)
    changed = " OR ".join(f"l.{q(c)} {differs} h.{q(hc)}" for _, c, hc in fields) or "1 = 0"
    rows_sql = (f"SELECT CAST(l.{q(pk.column)} AS TEXT), x.history_id, h.history_type, {cols} "
                f"FROM {live} l LEFT JOIN ({latest}) x "
                f"ON x.object_id = CAST(l.{q(pk.column)} AS TEXT) "
                f"LEFT JOIN {hist} h ON h.history_id = x.history_id "
                f"WHERE x.history_id IS NULL OR (h.history_id IS NOT NULL AND "
                f"(h.history_type = '-' OR {changed})) ORDER BY l.{q(pk.column)}")
    gone_sql = (f"SELECT x.object_id, x.history_id FROM ({latest}) x "
                f"JOIN {hist} h ON h.history_id = x.history_id "
                f"LEFT JOIN {live} l ON CAST(l.{q(pk.column)} AS TEXT) = x.object_id "
                f"WHERE l.{q(pk.column)} IS NULL AND h.history_type <> '-' "
                f"ORDER BY x.history_id")
    return fields, rows_sql, gone_sql, history._meta.label


def compare_model(model) -> list[LiveBreak]:
    """Every problem between ``model``'s live rows and its latest chained history rows."""
    label = model._meta.label
    fields, rows_sql, gone_sql, history_label = _sql(model)
    out: list[LiveBreak] = []
    with connection.cursor() as cur:
        cur.execute(rows_sql, [history_label])
        for oid, hid, kind, *values in cur.fetchall():
            if hid is None:
                out.append(LiveBreak(label, oid, None, "not in history",
                                     "The row has no chained history: it was written "
                                     "without the application."))
            elif kind == "-":
                out.append(LiveBreak(label, oid, None, "deleted in history",
                                     f"The history records the row as deleted (history row "
                                     f"{hid}) but it is in the table."))
            else:
                for (name, _c, _hc), now, was in zip(fields, values[0::2], values[1::2],
                                                     strict=True):
                    if now != was:
                        out.append(LiveBreak(
                            label, oid, name, "changed outside history",
                            f"The table holds {_short(now)}; its latest history row {hid} "
                            f"holds {_short(was)}."))
        cur.execute(gone_sql, [history_label])
        out.extend(LiveBreak(label, oid, None, "deleted outside history",
                             f"The row is gone from the table but its latest history row "
                             f"{hid} does not record a deletion.")
                   for oid, hid in cur.fetchall())
    return out


def attachment_breaks(*, full: bool, since=None) -> list[LiveBreak]:
    """Attachments whose stored file is not the one uploaded. ``full``: every file is
    hashed; otherwise only files uploaded at or after ``since`` are hashed and the others
    are checked for presence and size (a full check hashes them all)."""
    from register.models import Attachment

    out = []
    for att in Attachment.objects.order_by("pk").iterator(chunk_size=500):
        if full or since is None or att.uploaded_at >= since:
            why = attachment_altered(att)
        else:
            try:
                size = att.file.storage.size(att.file.name)
            except OSError:
                size = None
            why = ("The file is missing from storage." if size is None else
                   f"The stored file has {size} bytes but {att.size_bytes} were uploaded: it "
                   "was changed after it was attached." if size != att.size_bytes else "")
        if why:
            out.append(LiveBreak("register.Attachment", str(att.pk), "file", "file altered",
                                 why))
    return out


def live_breaks(*, full: bool, since=None) -> tuple[list[LiveBreak], int]:
    """The first :data:`LISTED` problems of every checked model and attachment file, and
    how many there are in all."""
    found: list[LiveBreak] = []
    for label in LIVE_CHECKED:
        found.extend(compare_model(apps.get_model(label)))
    found.extend(attachment_breaks(full=full, since=since))
    return found[:LISTED], len(found)
