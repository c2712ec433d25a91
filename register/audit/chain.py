"""Tamper-evident chain over the change history.

Every historical row that django-simple-history writes (each create, change, signature,
countersignature, deferral decision, bypass...) gets one :class:`ChainEntry` appended in
the same transaction:

* ``content_hash`` = SHA-256 of a canonical JSON of the historical row's stored field
  values (read back from the database, so what is hashed is what is kept);
* ``entry_hash`` = HMAC-SHA256, keyed with ``settings.CHAIN_KEY``, of ``prev_hash``
  followed by the canonical JSON of the entry's own fields (sequence, time, model, object,
  history row, action, actor, reason, content hash, scheme). Someone who can write to the
  database but does not hold the key cannot recompute the chain after changing it. Entries
  appended before the chain was keyed keep their plain SHA-256 (``scheme`` 1); the sealed
  checkpoint names the last of them, so no later entry can pass as one.

From time to time (Celery beat, and after every full check that finds the chain intact)
the head's sequence and hash are appended to an anchors file outside the database
(``settings.CHAIN_ANCHOR_FILE``); verification holds the chain to every anchor, so cutting
entries off the end, or rewriting an anchored entry, shows even with the key.

A transaction's entries are appended together just before it commits (the project's
database backends, ``register.dbwrap``, call :func:`flush`), locking the one-row
:class:`ChainHead` (``select_for_update``) only from then to the commit: concurrent
writers queue for that moment only, and the chain cannot fork. A rolled-back
transaction leaves no entry, as it leaves no history row.

:func:`verify_chain` recomputes everything and names the first broken entry.

Not covered: rows written with ``QuerySet.update()`` or ``bulk_create()`` leave no
historical row (for example ``TestPlan.next_due_on`` and its state dates, derived from
the records, and ``Bypass.announced_state``, excluded from history anyway, and synthetic benchmark
plants), and the separate many-to-many history tables; none of these are chained.

The key cannot be changed without making every keyed entry unverifiable: keep it with the
backups.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import decimal
import functools
import hashlib
import hmac
import json
import logging
import uuid
from dataclasses import dataclass, field

from django.apps import apps
from django.conf import settings
from django.db import DEFAULT_DB_ALIAS, connection, connections, transaction
from django.utils import timezone

from register.dbwrap import PENDING, ChainOnCommit, note_flushed, set_flush
from register.models import GENESIS_HASH, ChainCheckpoint, ChainEntry, ChainHead
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


def _key() -> bytes:
    return settings.CHAIN_KEY.encode("utf-8")


def keyed_hash(text: str) -> str:
    """HMAC-SHA256 of ``text`` with the chain key."""
    return hmac.new(_key(), text.encode("utf-8"), hashlib.sha256).hexdigest()


def entry_hash(prev_hash: str, entry: ChainEntry) -> str:
    """The entry's hash under its scheme: keyed (HMAC-SHA256) or, for entries appended
    before the chain was keyed, plain SHA-256. An unknown scheme gives no hash at all."""
    if entry.scheme == ChainEntry.HMAC_SHA256:
        return keyed_hash(prev_hash + canonical_json({**entry_payload(entry),
                                                      "scheme": entry.scheme}))
    if entry.scheme == ChainEntry.SHA256:
        return sha256_text(prev_hash + canonical_json(entry_payload(entry)))
    return ""


_SEALED = ("seq", "entry_hash", "verified_at", "full_verified_at", "full_verified_seq",
           "full_verified_ok", "unkeyed_until")


def checkpoint_seal(cp) -> str:
    """The keyed hash of a checkpoint's values (``ChainCheckpoint.seal``)."""
    return keyed_hash(canonical_json({name: getattr(cp, name) for name in _SEALED}))


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


def _locked_head() -> ChainHead:
    head = ChainHead.objects.select_for_update().filter(pk=HEAD_PK).first()
    if head is None:
        ChainHead.objects.get_or_create(pk=HEAD_PK)
        head = ChainHead.objects.select_for_update().get(pk=HEAD_PK)
    return head


def _append_rows(pending: list[tuple[type, int, str]]) -> list[ChainEntry]:
    """Append entries for these history rows, in this order, under one lock of the head:
    one read per history table (and its many-to-many tables), one insert, one head update.
    Rows no longer there (rolled back to a savepoint) are skipped."""
    by_model: dict[type, list[int]] = {}
    for model, history_id, _ in pending:
        by_model.setdefault(model, []).append(history_id)
    rows: dict[tuple[str, int], dict] = {}
    m2m: dict[str, dict[int, dict]] = {}
    for model, ids in by_model.items():
        label = model._meta.label
        for row in model._default_manager.filter(pk__in=ids).values():
            rows[(label, row[model._meta.pk.attname])] = row
        if m2m_history_models(model):
            m2m[label] = _m2m_rows(model, ids)
    head = _locked_head()
    seq, prev = head.last_seq, head.last_hash
    now = timezone.now()
    entries = []
    for model, history_id, actor in pending:
        label = model._meta.label
        row = rows.get((label, history_id))
        if row is None:
            continue
        seq += 1
        entry = ChainEntry(
            seq=seq, created_at=now, model_label=label,
            object_id=str(row[model.instance_type._meta.pk.attname]),
            history_id=history_id, action=row["history_type"], actor=actor,
            reason=(row.get("history_change_reason") or "")[:200],
            content_hash=content_hash(row_content(
                row, m2m.get(label, {}).get(history_id), label in m2m)),
            prev_hash=prev, scheme=ChainEntry.HMAC_SHA256,
        )
        entry.entry_hash = prev = entry_hash(prev, entry)
        entries.append(entry)
    if entries:
        ChainEntry.objects.bulk_create(entries)
        ChainHead.objects.filter(pk=HEAD_PK).update(last_seq=seq, last_hash=prev)
    return entries


def append(history_instance) -> ChainEntry:
    """Append the entry for one historical row now (locks the head)."""
    with transaction.atomic():
        (entry,) = _append_rows([(type(history_instance), history_instance.pk,
                                  _actor_name(history_instance))])
    return entry


def flush(using: str = DEFAULT_DB_ALIAS) -> list[ChainEntry]:
    """Append the entries of the history rows this transaction has written so far.

    Called by the database backend just before the transaction commits
    (``register.dbwrap``), and before anything reads the chain within the transaction
    (``ChainEntry.objects``, :func:`verify_chain`), so a transaction always sees its own
    entries. The head is locked from here to the commit only."""
    conn = connections[using]
    pending = conn.__dict__.get(PENDING)
    if not pending:
        return []
    taken = dict(pending)
    pending.clear()
    if conn.get_autocommit():
        with transaction.atomic(using=using):
            return _append_rows(list(taken.values()))
    note_flushed(conn, taken)
    return _append_rows(list(taken.values()))


set_flush(flush)


def on_history(sender, history_instance=None, **kwargs):
    """Receiver of simple-history's ``post_create_historical_record`` (connected in
    ``RegisterConfig.ready``): every historical row joins the chain. Inside a transaction
    the row waits for :func:`flush` (at the latest, just before the commit, by the
    database backend); outside one, or on a backend that does not flush, it is appended at
    once."""
    conn = connections[DEFAULT_DB_ALIAS]
    if conn.get_autocommit() or not isinstance(conn, ChainOnCommit):
        append(history_instance)
        return
    model = type(history_instance)
    conn.__dict__.setdefault(PENDING, {})[(model._meta.label, history_instance.pk)] = (
        model, history_instance.pk, _actor_name(history_instance))


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
    #: True: recomputed from the first entry; False: from the checkpoint ``from_seq`` on.
    full: bool = True
    from_seq: int = 0
    #: When the whole chain was last verified from its first entry, and whether it held.
    full_verified_at: dt.datetime | None = None
    full_verified_ok: bool | None = None
    #: Live rows (and attachment files) that differ from their latest chained history
    #: (``register.audit.live``): the first ones, and how many in all.
    live_breaks: list = field(default_factory=list)
    live_breaks_total: int = 0

    @property
    def chain_ok(self) -> bool:
        """The chain itself holds (whatever the live rows say)."""
        return self.first_break is None

    def summary(self) -> str:
        scope = "" if self.full else f" (checked from entry #{self.from_seq})"
        if self.ok:
            return (f"Chain intact: {self.entries} entries, {self.history_rows} history rows; "
                    f"head #{self.head_seq} {self.head_hash}{scope}")
        lines = [f"Chain BROKEN at {self.first_break}{scope}" if self.first_break else
                 f"Chain intact{scope}, but live rows differ from their history"]
        lines += [f"  {b}" for b in self.live_breaks]
        if self.live_breaks_total > len(self.live_breaks):
            lines.append(f"  ... and {self.live_breaks_total - len(self.live_breaks)} more")
        return "\n".join(lines)


def _hash_rows(label: str, model, rows, m2m: dict) -> dict[int, set[str]]:
    """history_id -> the content hashes each row may carry (with and without the columns
    added later, see ``ADDED_LATER``)."""
    has_m2m = bool(m2m_history_models(model))
    out = {}
    for row in rows:
        links = m2m.get(row["history_id"])
        accepted = {content_hash(row_content(row, links, has_m2m))}
        before = _as_chained_before(label, row)
        if before is not None:
            accepted.add(content_hash(row_content(before, links, has_m2m)))
        out[row["history_id"]] = accepted
    return out


def _all_content_hashes(models_by_label) -> dict[str, dict[int, set[str]]]:
    """Content hashes of every historical row, streamed per model."""
    return {label: _hash_rows(
        label, model, model._default_manager.order_by().values().iterator(chunk_size=2000),
        _m2m_rows(model, None) if m2m_history_models(model) else {})
        for label, model in models_by_label.items()}


def _content_hashes_of(models_by_label, entries) -> dict[str, dict[int, set[str]]]:
    """Content hashes of just the historical rows the given entries cover."""
    wanted: dict[str, list[int]] = {}
    for e in entries:
        wanted.setdefault(e.model_label, []).append(e.history_id)
    current: dict[str, dict[int, set[str]]] = {}
    for label, ids in wanted.items():
        model = models_by_label.get(label)
        if model is None:
            continue
        hashes: dict[int, set[str]] = {}
        for start in range(0, len(ids), 5000):
            chunk = ids[start:start + 5000]
            m2m = _m2m_rows(model, chunk) if m2m_history_models(model) else {}
            hashes.update(_hash_rows(label, model, model._default_manager.order_by().filter(
                history_id__in=chunk).values(), m2m))
        current[label] = hashes
    return current


def _check_entry(e: ChainEntry, current, unkeyed_until: int) -> Break | None:
    """The entry's scheme, its own hash and the content of the historical row it covers."""
    if e.scheme != ChainEntry.HMAC_SHA256 and e.seq > unkeyed_until:
        return Break(e.seq, e.model_label, e.object_id, e.history_id, "entry altered",
                     f"The entry is marked as hashed without the chain key, but every entry "
                     f"after #{unkeyed_until} is keyed.")
    if entry_hash(e.prev_hash, e) != e.entry_hash:
        return Break(e.seq, e.model_label, e.object_id, e.history_id, "entry altered",
                     "The entry's fields no longer give its recorded hash.")
    rows = current.get(e.model_label)
    if rows is None or e.history_id not in rows:
        return Break(e.seq, e.model_label, e.object_id, e.history_id, "history row deleted",
                     "The historical row this entry covers no longer exists.")
    if e.content_hash not in rows[e.history_id]:
        return Break(e.seq, e.model_label, e.object_id, e.history_id, "content changed",
                     f"The historical row now hashes to {min(rows[e.history_id])} instead of "
                     f"{e.content_hash}.")
    return None


def _coverage_break(models_by_label, label: str, history_ids: set[int],
                    chained_ids: set[int]) -> Break | None:
    """A historical row without an entry, or an entry whose historical row is gone."""
    model = models_by_label[label]
    missing = sorted(history_ids - chained_ids)
    if missing:
        row = _row_of(model, missing[0])
        pk_name = model.instance_type._meta.pk.attname
        return Break(None, label, str(row[pk_name]), missing[0], "entry missing",
                     f"{len(missing)} historical row(s) of this model have no chain entry.")
    gone = sorted(chained_ids - history_ids)
    if gone:
        e = ChainEntry.objects.filter(model_label=label, history_id=gone[0]).first()
        return Break(e.seq if e else None, label, e.object_id if e else "?", gone[0],
                     "history row deleted",
                     f"{len(gone)} historical row(s) of this model that the chain covers no "
                     "longer exist.")
    return None


def _counted_coverage(models_by_label) -> tuple[int, int, Break | None]:
    """Every historical row has one entry and every entry its row, by counting per model
    (one query per model and one for the chain); a model whose counts differ is compared
    row by row. Returns (historical rows, entries, first break)."""
    from django.db.models import Count

    chained = dict(ChainEntry.objects.order_by().values_list("model_label").annotate(
        n=Count("id")).values_list("model_label", "n"))
    total, first = 0, None
    for label, model in models_by_label.items():
        n = model._default_manager.count()
        total += n
        if first is None and n != chained.get(label, 0):
            first = _coverage_break(
                models_by_label, label,
                set(model._default_manager.values_list("history_id", flat=True)),
                set(ChainEntry.objects.filter(model_label=label).values_list(
                    "history_id", flat=True)))
    return total, sum(chained.values()), first


def _walk(entries, prev_hash: str, expected_seq: int, seen, lookup, unkeyed_until: int):
    """Go through ``entries`` in order: unbroken sequence, each linked to the one before,
    each entry and its historical row as hashed (``lookup(batch)`` gives the rows' content
    hashes). Notes every covered history id in ``seen`` (unless None). Returns (entries
    seen, the last one, the first break)."""
    count, last, first = 0, None, None
    for batch in _batched(entries.iterator(chunk_size=2000), 2000):
        count += len(batch)
        last = batch[-1]
        if seen is not None:
            for e in batch:
                if e.model_label in seen:
                    seen[e.model_label].add(e.history_id)
        if first is not None:
            continue
        rows = lookup(batch)
        for e in batch:
            if e.seq != expected_seq:
                first = Break(expected_seq, "?", "?", None, "entry missing",
                              f"Entries #{expected_seq}..#{e.seq - 1} are missing from the "
                              "chain.")
            elif e.prev_hash != prev_hash:
                first = Break(e.seq, e.model_label, e.object_id, e.history_id,
                              "entry missing",
                              "The entry does not link to the previous entry's hash.")
            else:
                first = _check_entry(e, rows, unkeyed_until)
            if first is not None:
                break
            prev_hash, expected_seq = e.entry_hash, e.seq + 1
    return count, last, first


def _batched(iterable, n):
    batch = []
    for item in iterable:
        batch.append(item)
        if len(batch) == n:
            yield batch
            batch = []
    if batch:
        yield batch


@contextlib.contextmanager
def _snapshot():
    """On PostgreSQL, read everything from one snapshot (REPEATABLE READ), so a write that
    commits half-way through a check is seen either wholly or not at all. Inside an outer
    transaction (tests, a request already in one) the reads share that transaction."""
    if connection.vendor != "postgresql" or connection.in_atomic_block:
        yield
        return
    with transaction.atomic():
        with connection.cursor() as cur:
            cur.execute("SET TRANSACTION ISOLATION LEVEL REPEATABLE READ READ ONLY")
        yield


def checkpoint() -> ChainCheckpoint | None:
    return ChainCheckpoint.objects.filter(pk=HEAD_PK).first()


def verify_chain(*, incremental: bool = False, record: bool = True) -> VerifyResult:
    """Recompute the chain from the historical rows; report the first break.

    ``incremental=False`` (the default) recomputes every entry from the first one.
    ``incremental=True`` starts at the checkpoint the last intact check reached: it first
    confirms that entry still hashes to the hash recorded with the checkpoint, then
    recomputes every later entry and the rows they cover; rows and entries before the
    checkpoint are only counted (a deleted historical row or entry shows; a historical row
    changed in place before the checkpoint is found by the next full check). Without a
    checkpoint, or while the last full check found the chain broken, it checks in full.

    Breaks, in the order of the chain: an entry whose own fields no longer give its hash
    (entry altered), a gap in sequence or a link to a hash that is not the previous entry's
    (entry missing), a historical row that no longer exists (history row deleted), a
    historical row whose content no longer gives the recorded hash (content changed).
    After the last entry: the head must name it, and no historical row may lack an entry.
    Then every live row is compared with its latest chained historical row, and every
    attachment's file with its recorded SHA-256 (``register.audit.live``; from the
    checkpoint, files uploaded before it are checked for presence and size only).

    The checkpoint's seal must fit its values, every entry after ``unkeyed_until`` must be
    keyed, and the chain must reach, unchanged, every entry anchored outside the database
    (``register.audit.anchors``).

    With ``record`` an intact chain moves the checkpoint to the head (and a full check
    records its time and outcome, live rows included, in any case); a full check that finds
    the chain intact anchors its head.
    """
    flush()  # this transaction's own entries first
    models_by_label = historical_models()
    cp = checkpoint()
    first = _seal_break(cp)
    # An altered checkpoint is not trusted: the check starts from the first entry and
    # accepts no unkeyed entry. A chain the last full check found broken is checked in
    # full until it holds again.
    trusted = cp is not None and first is None
    unkeyed_until = cp.unkeyed_until if trusted else 0
    start = cp.seq if (incremental and trusted and cp.seq > 0
                       and cp.full_verified_ok is not False) else 0
    with _snapshot():
        entries = ChainEntry.objects.order_by("seq")
        if start:
            entries = entries.filter(seq__gte=start)
            from_entry = ChainEntry.objects.filter(seq=start).first()
            if from_entry is None:
                first = Break(start, "?", "?", None, "entry missing",
                              f"Entry #{start}, where the last check stopped, is gone.")
            elif from_entry.entry_hash != cp.entry_hash:
                first = Break(start, from_entry.model_label, from_entry.object_id,
                              from_entry.history_id, "entry altered",
                              f"Entry #{start}, where the last check stopped, now carries a "
                              f"different hash than was verified then ({cp.entry_hash}).")
            prev_hash = from_entry.prev_hash if from_entry else GENESIS_HASH
            expected_seq = start
            current = None  # looked up per batch below
        else:
            prev_hash, expected_seq = GENESIS_HASH, 1
            current = _all_content_hashes(models_by_label)

        seen: dict[str, set[int]] = {label: set() for label in models_by_label}
        count, last, walked = _walk(
            entries, prev_hash, expected_seq, seen if current is not None else None,
            (lambda batch: current) if current is not None
            else (lambda batch: _content_hashes_of(models_by_label, batch)), unkeyed_until)
        first = first or walked

        head = ChainHead.objects.filter(pk=HEAD_PK).first()
        if last is None and start:
            last = ChainEntry.objects.order_by("-seq").first()
        head_seq = last.seq if last else 0
        head_hash = last.entry_hash if last else GENESIS_HASH
        if first is None and head is not None and (head.last_seq, head.last_hash) != (
                head_seq, head_hash):
            first = Break(head.last_seq, "?", "?", None, "entry missing",
                          f"The chain head names entry #{head.last_seq} but the last entry is "
                          f"#{head_seq}.")
        from register.audit.anchors import anchor_break, write_anchor
        from register.audit.live import live_breaks

        first = first or anchor_break(head_seq)
        if current is not None:
            total_rows = sum(len(rows) for rows in current.values())
            if first is None:
                for label, rows in current.items():
                    first = _coverage_break(models_by_label, label, set(rows), seen[label])
                    if first is not None:
                        break
        else:
            total_rows, count, coverage = _counted_coverage(models_by_label)
            first = first or coverage


        listed, total = live_breaks(full=not start, since=cp.verified_at if start else None)

    result = VerifyResult(ok=first is None and not total, entries=count, head_seq=head_seq,
                          head_hash=head_hash, history_rows=total_rows, first_break=first,
                          full=not start, from_seq=start, live_breaks=listed,
                          live_breaks_total=total)
    if record:
        _record(result)
        if result.full and result.chain_ok:
            write_anchor(result.head_seq, result.head_hash)
    cp = checkpoint()
    if cp is not None:
        result.full_verified_at, result.full_verified_ok = cp.full_verified_at, \
            cp.full_verified_ok
    return result


def _seal_break(cp) -> Break | None:
    if cp is None or cp.seal == checkpoint_seal(cp):
        return None
    return Break(None, "register.ChainCheckpoint", str(cp.pk), None, "checkpoint altered",
                 "The checkpoint's values no longer fit its seal: it was changed without the "
                 "chain key. It is not used until it is put right.")


def _record(result: VerifyResult) -> None:
    """Move the checkpoint to the head after an intact check (never backwards); note a full
    check's time and outcome either way; seal it. An altered checkpoint is left as found
    (sealing it would make its changed values pass)."""
    with transaction.atomic():
        cp = ChainCheckpoint.objects.select_for_update().filter(pk=HEAD_PK).first()
        if cp is None:
            cp = ChainCheckpoint(pk=HEAD_PK)  # a chain begun after keying: nothing unkeyed
        elif _seal_break(cp) is not None:
            return
        if result.chain_ok and result.head_seq >= cp.seq:
            cp.seq, cp.entry_hash = result.head_seq, result.head_hash
            cp.verified_at = result.checked_at
        if result.full:
            cp.full_verified_at, cp.full_verified_ok = result.checked_at, result.ok
            cp.full_verified_seq = result.head_seq
        cp.seal = checkpoint_seal(cp)
        cp.save()


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
