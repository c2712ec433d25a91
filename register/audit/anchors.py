"""Anchors of the change chain outside the database.

An anchor is one line of JSON appended to ``settings.CHAIN_ANCHOR_FILE``: the head's
sequence and hash, when it was taken, which chain it belongs to (the hash of the chain's
first entry, so databases sharing a folder keep apart) and a keyed hash of all that. Lines
are only ever appended. :func:`anchor_break` holds the chain to every anchor of its own:
a chain that now ends before an anchored entry lost entries from its end (a cut that leaves
the rest of the chain linked and keyed, and that the chain alone cannot show); an anchored
entry whose hash changed was rewritten.

Written by the Celery beat task ``register.chain_anchor`` and after every full check that
finds the chain intact (``register.audit.chain.verify_chain``). Keep the file on storage
the database's users cannot write, or copy it off the machine.
"""

from __future__ import annotations

import json
import logging
import os
from pathlib import Path

from celery import shared_task
from django.conf import settings
from django.utils import timezone

from register.audit.chain import Break, canonical_json, keyed_hash
from register.models import ChainEntry

log = logging.getLogger(__name__)


def anchor_path() -> Path:
    return Path(settings.CHAIN_ANCHOR_FILE)


def chain_id() -> str | None:
    """The chain's identity: the hash of its first entry (None for an empty chain)."""
    return ChainEntry.objects.filter(seq=1).values_list("entry_hash", flat=True).first()


def _mac(line: dict) -> str:
    return keyed_hash(canonical_json({k: v for k, v in line.items() if k != "mac"}))


def write_anchor(seq: int, entry_hash: str, chain: str | None = None) -> dict | None:
    """Append an anchor of entry ``seq`` with hash ``entry_hash``; None for an empty chain."""
    chain = chain or chain_id()
    if not seq or chain is None:
        return None
    line = {"chain": chain, "seq": seq, "hash": entry_hash,
            "at": timezone.now().isoformat(timespec="seconds")}
    line["mac"] = _mac(line)
    path = anchor_path()
    path.parent.mkdir(parents=True, exist_ok=True)
    with path.open("a", encoding="utf-8") as fh:
        fh.write(json.dumps(line, sort_keys=True) + "\n")
        fh.flush()
        os.fsync(fh.fileno())
    return line


def read_anchors() -> list[tuple[int, dict | None]]:
    """(line number, anchor) for every line of the file; None for a line that is not an
    anchor (or whose keyed hash does not fit it)."""
    path = anchor_path()
    if not path.exists():
        return []
    out = []
    with path.open(encoding="utf-8") as fh:
        for number, text in enumerate(fh, start=1):
            if not text.strip():
                continue
            try:
                line = json.loads(text)
                ok = (isinstance(line, dict) and isinstance(line.get("seq"), int)
                      and isinstance(line.get("hash"), str) and line.get("mac") == _mac(line))
            except (ValueError, TypeError):
                ok = False
            out.append((number, line if ok else None))
    return out


def latest_anchor() -> dict | None:
    """The newest anchor of this chain in the anchors file (None: not anchored yet)."""
    mine = chain_id()
    lines = [line for _, line in read_anchors() if line and line["chain"] == mine]
    return max(lines, key=lambda a: a["seq"]) if lines else None


def anchor_break(head_seq: int) -> Break | None:
    """The first way the chain departs from its anchors, or None."""
    mine = chain_id()
    if mine is None:
        return None
    anchors = []
    for number, line in read_anchors():
        if line is None:
            return Break(None, "anchors file", f"line {number}", None, "anchor altered",
                         f"Line {number} of {anchor_path()} is not an anchor the chain key "
                         "made.")
        if line["chain"] == mine:
            anchors.append(line)
    if not anchors:
        return None
    top = max(anchors, key=lambda a: a["seq"])
    if top["seq"] > head_seq:
        return Break(top["seq"], "?", "?", None, "entries cut off",
                     f"The chain ends at entry #{head_seq}, but entry #{top['seq']} was "
                     f"anchored at {top['at']}: entries were removed from its end.")
    hashes = dict(ChainEntry.objects.filter(seq__in={a["seq"] for a in anchors})
                  .values_list("seq", "entry_hash"))
    for a in sorted(anchors, key=lambda a: a["seq"]):
        if hashes.get(a["seq"]) != a["hash"]:
            e = ChainEntry.objects.filter(seq=a["seq"]).first()
            return Break(a["seq"], e.model_label if e else "?", e.object_id if e else "?",
                         e.history_id if e else None, "anchored entry changed",
                         f"Entry #{a['seq']} was anchored at {a['at']} with hash {a['hash']}; "
                         f"it now has {hashes.get(a['seq'], 'no entry')}.")
    return None


@shared_task(name="register.chain_anchor")
def anchor_chain() -> dict:
    """Check the chain from its checkpoint and, if it holds, note its head in the anchors
    file; run by beat every hour (``CELERY_BEAT_SCHEDULE``)."""
    from register.audit.chain import verify_chain

    result = verify_chain(incremental=True)
    line = write_anchor(result.head_seq, result.head_hash) if result.chain_ok else None
    return {"ok": result.chain_ok, "head_seq": result.head_seq, "anchored": line is not None,
            "break": str(result.first_break) if result.first_break else None}
