"""Tamper-evident chain over the change history.

Every historical row that django-simple-history writes (each create, change, signature,
countersignature, deferral decision, bypass...) gets one :class:`ChainEntry` appended in
the same transaction:

* ``content_hash`` = SHA-256 of a canonical JSON of the historical row's stored field
  values (read back from the database, so what is hashed is what is kept);
* ``entry_hash`` = SHA-256 of ``prev_hash`` followed by the canonical JSON of the entry's
  own fields (sequence, time, model, object, history row, action, actor, reason,
  content hash).

Appends lock the one-row :class:`ChainHead` (``select_for_update``), so concurrent
writers queue and the chain cannot fork.

:func:`verify_chain` recomputes everything and names the first broken entry.

Not covered: rows written with ``QuerySet.update()`` or ``bulk_create()`` leave no
historical row (for example ``TestPlan.next_due_on`` and its state dates, derived from
the records, and ``Bypass.announced_state``, excluded from history anyway, and synthetic benchmark
plants), and the separate many-to-many history tables; none of these are chained.
"""

from __future__ import annotations

import datetime as dt
import decimal
import functools
import hashlib
import json
import logging
import uuid
from dataclasses import dataclass, field

from django.apps import apps
from django.db import transaction
from django.utils import timezone

from register.models import GENESIS_HASH, ChainEntry, ChainHead
from register.people import person_name

HEAD_PK = 1

log = logging.getLogger(__name__)


# ---------------------------------------------------------------------------------------
# Canonical JSON and hashes
# ---------------------------------------------------------------------------------------


def _plain(value):
    if isinstance(value, dt.datetime):
        if timezone.is_aware(value):
            value = value.astimezone(dt.UTC)
        return value.isoformat()
    if isinstance(value, (dt.date, dt.time)):
        return value.isoformat()
    if isinstance(value, decimal.Decimal):
        return str(value)
    if isinstance(value, uuid.UUID):
        return str(value)
    if isinstance(value, (bytes, memoryview)):
        return bytes(value).hex()
    raise TypeError(f"cannot put {type(value).__name__} in canonical JSON")


def canonical_json(data) -> str:
    """Sorted keys, no spaces, UTF-8, floats as Python's shortest repr."""
    return json.dumps(data, sort_keys=True, separators=(",", ":"), ensure_ascii=False,
                      default=_plain)


def sha256_text(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def content_hash(row: dict) -> str:
    """Hash of one historical row given as ``values()`` (column attnames -> values)."""
    return sha256_text(canonical_json(row))


#: Columns added to history tables after rows of them were already chained, with the value
#: the migration gave every earlier row. A row chained before a column existed was hashed
#: without it: verification also accepts the row's hash without these columns while they
#: still hold that value (a row whose added column was later changed does not match).
ADDED_LATER: dict[str, dict[str, object]] = {
    "register.historicalbypass": {"authorised_until": None, "escalates_at": None,
                                  "authorised_at": None, "closed_by_id": None,
                                  "requested_by_id": None},
    "register.historicalsite": {"time_zone": "UTC"},
    "register.historicaltestplan": {"effective_from": None},
    "register.historicaldemand": {"cause": "not_recorded"},
    "register.historicalteststep": {"applies_to_role": "", "applies_to_type_id": None},
}


def _as_chained_before(label: str, row: dict) -> dict | None:
    """The row without the columns added later, if they all hold their first value."""
    added = ADDED_LATER.get(label.lower())
    if not added or not any(k in row for k in added):
        return None
    if any(row.get(k) != v for k, v in added.items() if k in row):
        return None
    return {k: v for k, v in row.items() if k not in added}


def entry_payload(entry: ChainEntry) -> dict:
    return {
        "seq": entry.seq, "created_at": _plain(entry.created_at), "model": entry.model_label,
        "object_id": entry.object_id, "history_id": entry.history_id, "action": entry.action,
        "actor": entry.actor, "reason": entry.reason, "content_hash": entry.content_hash,
    }


def entry_hash(prev_hash: str, entry: ChainEntry) -> str:
    return sha256_text(prev_hash + canonical_json(entry_payload(entry)))


@functools.cache
def _is_history(model) -> bool:
    names = {f.name for f in model._meta.get_fields()}
    return {"history_id", "history_type", "history_date"} <= names and hasattr(
        model, "instance_type")


def historical_models() -> dict[str, type]:
    """Label -> historical model class, for every model django-simple-history tracks."""
    return {m._meta.label: m for m in apps.get_models() if _is_history(m)}


@functools.cache
def m2m_history_models(model) -> tuple[type, ...]:
    """The many-to-many history tables hanging off a historical model (their rows are
    written just before the parent's signal and are hashed with the parent row)."""
    out = []
    for m in apps.get_models():
        if _is_history(m):
            continue
        fk = next((f for f in m._meta.get_fields() if f.name == "history"
                   and getattr(f, "related_model", None) is model), None)
        if fk is not None:
            out.append(m)
    return tuple(sorted(out, key=lambda m: m._meta.label))


def _m2m_rows(model, history_ids) -> dict[int, dict[str, list]]:
    """history_id -> {m2m label: sorted rows} for the given parent rows (None = all)."""
    out: dict[int, dict[str, list]] = {}
    for m in m2m_history_models(model):
        qs = m._default_manager.order_by()
        if history_ids is not None:
            qs = qs.filter(history_id__in=history_ids)
        for row in qs.values().iterator(chunk_size=2000):
            out.setdefault(row["history_id"], {}).setdefault(m._meta.label, []).append(row)
    for groups in out.values():
        for rows in groups.values():
            rows.sort(key=lambda r: canonical_json(r))
    return out


def row_content(row: dict, m2m: dict | None, has_m2m: bool) -> dict:
    if not has_m2m:
        return row
    return {"row": row, "m2m": m2m or {}}


def _row_of(model, history_id: int) -> dict | None:
    return model._default_manager.filter(pk=history_id).values().first()


# ---------------------------------------------------------------------------------------
# Appending
# ---------------------------------------------------------------------------------------


def _actor_name(history_instance) -> str:
    return person_name(getattr(history_instance, "history_user", None))[:200]


def append(history_instance) -> ChainEntry:
    """Append the entry for one historical row (locks the head; call inside the write)."""
    model = type(history_instance)
    with transaction.atomic():
        head = ChainHead.objects.select_for_update().filter(pk=HEAD_PK).first()
        if head is None:
            head, _ = ChainHead.objects.get_or_create(pk=HEAD_PK)
            head = ChainHead.objects.select_for_update().get(pk=HEAD_PK)
        row = _row_of(model, history_instance.pk)
        pk_name = history_instance.instance_type._meta.pk.attname
        entry = ChainEntry(
            seq=head.last_seq + 1, created_at=timezone.now(),
            model_label=model._meta.label, object_id=str(row[pk_name]),
            history_id=history_instance.pk, action=row["history_type"],
            actor=_actor_name(history_instance),
            reason=(row.get("history_change_reason") or "")[:200],
            content_hash=content_hash(row_content(
                row, _m2m_rows(model, [history_instance.pk]).get(history_instance.pk),
                bool(m2m_history_models(model)))),
            prev_hash=head.last_hash,
        )
        entry.entry_hash = entry_hash(head.last_hash, entry)
        entry.save()
        ChainHead.objects.filter(pk=HEAD_PK).update(last_seq=entry.seq,
                                                    last_hash=entry.entry_hash)
    return entry


def on_history(sender, history_instance=None, **kwargs):
    """Receiver of simple-history's ``post_create_historical_record`` (connected in
    ``RegisterConfig.ready``): every historical row joins the chain."""
    append(history_instance)


# ---------------------------------------------------------------------------------------
# Verification
# ---------------------------------------------------------------------------------------


@dataclass
class Break:
    seq: int | None
    model: str
    object_id: str
    history_id: int | None
    kind: str  # content changed / entry missing / entry altered / history row deleted
    detail: str

    def __str__(self):
        where = f"entry #{self.seq}" if self.seq is not None else "no entry"
        return (f"{where}: {self.kind} - {self.model} object {self.object_id} "
                f"(history row {self.history_id}). {self.detail}")


@dataclass
class VerifyResult:
    ok: bool
    entries: int
    head_seq: int
    head_hash: str
    history_rows: int
    first_break: Break | None = None
    checked_at: dt.datetime = field(default_factory=timezone.now)

    def summary(self) -> str:
        if self.ok:
            return (f"Chain intact: {self.entries} entries, {self.history_rows} history rows; "
                    f"head #{self.head_seq} {self.head_hash}")
        return f"Chain BROKEN at {self.first_break}"


def verify_chain() -> VerifyResult:
    """Recompute every entry from the historical rows and the chain; report the first break.

    Breaks, in the order of the chain: an entry whose own fields no longer give its hash
    (entry altered), a gap in sequence or a link to a hash that is not the previous entry's
    (entry missing), a historical row that no longer exists (history row deleted), a
    historical row whose content no longer gives the recorded hash (content changed).
    After the last entry: the head must name it, and no historical row may lack an entry.
    """
    models_by_label = historical_models()
    # Content hashes of every historical row, streamed per model.
    current: dict[str, dict[int, str]] = {}
    total_rows = 0
    for label, model in models_by_label.items():
        hashes = {}
        has_m2m = bool(m2m_history_models(model))
        m2m = _m2m_rows(model, None) if has_m2m else {}
        for row in model._default_manager.order_by().values().iterator(chunk_size=2000):
            links = m2m.get(row["history_id"])
            accepted = {content_hash(row_content(row, links, has_m2m))}
            before = _as_chained_before(label, row)
            if before is not None:
                accepted.add(content_hash(row_content(before, links, has_m2m)))
            hashes[row["history_id"]] = accepted
        current[label] = hashes
        total_rows += len(hashes)

    seen: dict[str, set[int]] = {label: set() for label in models_by_label}
    prev_hash, expected_seq, count = GENESIS_HASH, 1, 0
    first: Break | None = None
    last = None
    for e in ChainEntry.objects.order_by("seq").iterator(chunk_size=2000):
        count += 1
        last = e
        if first is None:
            if e.seq != expected_seq:
                first = Break(expected_seq, "?", "?", None, "entry missing",
                              f"Entries #{expected_seq}..#{e.seq - 1} are missing from the "
                              "chain.")
            elif e.prev_hash != prev_hash:
                first = Break(e.seq, e.model_label, e.object_id, e.history_id, "entry missing",
                              "The entry does not link to the previous entry's hash.")
            elif entry_hash(e.prev_hash, e) != e.entry_hash:
                first = Break(e.seq, e.model_label, e.object_id, e.history_id, "entry altered",
                              "The entry's fields no longer give its recorded hash.")
            else:
                rows = current.get(e.model_label)
                if rows is None or e.history_id not in rows:
                    first = Break(e.seq, e.model_label, e.object_id, e.history_id,
                                  "history row deleted",
                                  "The historical row this entry covers no longer exists.")
                elif e.content_hash not in rows[e.history_id]:
                    first = Break(e.seq, e.model_label, e.object_id, e.history_id,
                                  "content changed",
                                  f"The historical row now hashes to "
                                  f"{min(rows[e.history_id])} instead of {e.content_hash}.")
        if e.model_label in seen:
            seen[e.model_label].add(e.history_id)
        prev_hash, expected_seq = e.entry_hash, e.seq + 1

    head = ChainHead.objects.filter(pk=HEAD_PK).first()
    head_seq = last.seq if last else 0
    head_hash = last.entry_hash if last else GENESIS_HASH
    if first is None and head is not None and (head.last_seq, head.last_hash) != (
            head_seq, head_hash):
        first = Break(head.last_seq, "?", "?", None, "entry missing",
                      f"The chain head names entry #{head.last_seq} but the last entry is "
                      f"#{head_seq}.")
    if first is None:
        for label, rows in current.items():
            missing = sorted(set(rows) - seen[label])
            if missing:
                model = models_by_label[label]
                row = _row_of(model, missing[0])
                pk_name = model.instance_type._meta.pk.attname
                first = Break(None, label, str(row[pk_name]), missing[0], "entry missing",
                              f"{len(missing)} historical row(s) of this model have no chain "
                              "entry.")
                break
    return VerifyResult(ok=first is None, entries=count, head_seq=head_seq,
                        head_hash=head_hash, history_rows=total_rows, first_break=first)


# ---------------------------------------------------------------------------------------
# Attachments: the file on disk against the SHA-256 recorded at upload
# ---------------------------------------------------------------------------------------


def file_sha256(fieldfile) -> str | None:
    """SHA-256 of a stored file, streamed; None when the file is missing."""
    digest = hashlib.sha256()
    try:
        with fieldfile.storage.open(fieldfile.name, "rb") as handle:
            for chunk in iter(lambda: handle.read(1 << 20), b""):
                digest.update(chunk)
    except FileNotFoundError:
        return None
    return digest.hexdigest()


def attachment_altered(att) -> str:
    """Why an attachment's stored file no longer is the one uploaded ("" when it is):
    missing, or its SHA-256 differs from the recorded one. Logged when not intact."""
    actual = file_sha256(att.file)
    if actual is None:
        why = "The file is missing from storage."
    elif actual != att.sha256:
        why = (f"The stored file hashes to {actual} but {att.sha256} was recorded at "
               "upload: it was changed after it was attached.")
    else:
        return ""
    log.error("attachment %s (%s) of record %s: %s", att.pk, att.file.name, att.record_id,
              why)
    return why


# ---------------------------------------------------------------------------------------
# What a user may see of the chain
# ---------------------------------------------------------------------------------------


def entries_for(user, limit: int = 50, scan: int = 2000) -> list[ChainEntry]:
    """The newest chain entries about records at the sites where ``user`` may read the
    chain (``Action.VIEW_CHAIN``); a superuser sees all. An entry whose record no longer
    exists, or has no site, is shown to superusers only. Looks through the newest ``scan``
    entries, one query per historical model among them."""
    from django.apps import apps

    from register.permissions import Action, sites_with

    sites = sites_with(user, Action.VIEW_CHAIN)
    newest = list(ChainEntry.objects.order_by("-seq")[:limit if sites is None else scan])
    if sites is None:
        return newest
    wanted: dict[str, set[str]] = {}
    for e in newest:
        wanted.setdefault(e.model_label, set()).add(e.object_id)
    site_of: dict[tuple[str, str], int | None] = {}
    for label, ids in wanted.items():
        history_model = apps.get_model(label)
        model = history_model.instance_type
        path = getattr(model, "site_path", "missing")
        if path == "missing":
            continue
        pk = model._meta.pk.attname
        column = f"{path}_id" if path else pk
        if path is None:
            rows = model.objects.filter(pk__in=ids).values_list(pk, pk)
        else:
            rows = model.objects.filter(pk__in=ids).values_list(pk, column)
        for obj_id, site_id in rows:
            site_of[(label, str(obj_id))] = site_id
    return [e for e in newest if site_of.get((e.model_label, e.object_id)) in sites][:limit]
