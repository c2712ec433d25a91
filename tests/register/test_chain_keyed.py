"""The keyed chain (HMAC-SHA256 with settings.CHAIN_KEY), entries from before the key, the
sealed checkpoint, and the anchors kept outside the database."""

import datetime as dt
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from django.conf import settings
from django.utils import timezone

from register import choices, services
from register.audit import anchors
from register.audit import chain as audit
from register.audit.anchors import anchor_chain
from register.models import ChainCheckpoint, ChainEntry
from tests import factories as f
from tests.register.tamper import raw

pytestmark = pytest.mark.django_db

T = ChainEntry._meta.db_table
ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture
def plant():
    s = f.site()
    sif = f.sif(f.unit(s))
    lead = f.user("lead", site=s, role=choices.Role.LEAD)
    services.open_bypass(user=lead, sif=sif, started_at=timezone.now() - dt.timedelta(hours=1),
                         authorised_hours=4, reason="maintenance")
    return sif, lead


def _rewrite(hasher, scheme_of=lambda e: e.scheme):
    """Recompute every link and hash of the chain in SQL with ``hasher(prev_hash, entry)``
    (and the head to match), as someone rewriting the whole chain would."""
    prev = audit.GENESIS_HASH
    for e in ChainEntry.objects.order_by("seq"):
        e.scheme, e.prev_hash = scheme_of(e), prev
        e.entry_hash = hasher(prev, e)
        raw(f"UPDATE {T} SET scheme = %s, prev_hash = %s, entry_hash = %s WHERE seq = %s",
            [e.scheme, e.prev_hash, e.entry_hash, e.seq])
        prev = e.entry_hash
    raw("UPDATE register_chainhead SET last_hash = %s", [prev])


def _plain_sha256(prev, e):
    return audit.sha256_text(prev + audit.canonical_json({**audit.entry_payload(e),
                                                         "scheme": e.scheme}))


def test_new_entries_are_keyed(plant):
    e = ChainEntry.objects.order_by("-seq").first()
    assert e.scheme == ChainEntry.HMAC_SHA256
    import hashlib
    import hmac
    text = e.prev_hash + audit.canonical_json({**audit.entry_payload(e), "scheme": 2})
    assert e.entry_hash == hmac.new(settings.CHAIN_KEY.encode(), text.encode(),
                                    hashlib.sha256).hexdigest()
    assert e.entry_hash != audit.sha256_text(text)
    assert audit.verify_chain().ok


def test_rehashing_the_chain_without_the_key_is_detected(plant):
    assert audit.verify_chain().ok
    _rewrite(_plain_sha256)
    brk = audit.verify_chain().first_break
    assert (brk.seq, brk.kind) == (1, "entry altered")


def test_rehashing_the_chain_with_another_key_is_detected(plant, settings):
    real = settings.CHAIN_KEY
    ChainCheckpoint.objects.all().delete()  # (its seal, too, is made with the key)
    settings.CHAIN_KEY = "not-the-chain-key-but-just-as-long-0123"
    _rewrite(audit.entry_hash)
    assert audit.verify_chain(record=False).ok  # holds under the wrong key...
    settings.CHAIN_KEY = real
    brk = audit.verify_chain().first_break  # ...but not under the right one
    assert (brk.seq, brk.kind) == (1, "entry altered")


def test_passing_keyed_entries_off_as_unkeyed_is_detected(plant):
    assert ChainCheckpoint.objects.get().unkeyed_until == 0  # a chain begun keyed
    _rewrite(audit.entry_hash, scheme_of=lambda e: ChainEntry.SHA256)
    brk = audit.verify_chain().first_break
    assert (brk.seq, brk.kind) == (1, "entry altered")
    assert "without the chain key" in brk.detail


def _as_if_keyed_after(n):
    """The chain as a register upgraded at entry ``n`` holds it: entries up to ``n`` in plain
    SHA-256, the later ones keyed, the checkpoint naming ``n`` under its seal."""
    _rewrite(audit.entry_hash, scheme_of=lambda e: ChainEntry.SHA256 if e.seq <= n
             else ChainEntry.HMAC_SHA256)
    cp = ChainCheckpoint.objects.get()
    cp.unkeyed_until = n
    cp.seal = audit.checkpoint_seal(cp)
    cp.save()


def test_entries_from_before_the_key_still_verify(plant):
    _sif, lead = plant
    n = ChainEntry.objects.count() - 3
    _as_if_keyed_after(n)
    assert audit.verify_chain().ok
    services.update_design(_sif, lead, reason="Faster valve", reference="CR-2",
                           changes={"safe_state": "Outlet closed"})
    assert ChainEntry.objects.order_by("-seq").first().scheme == ChainEntry.HMAC_SHA256
    assert audit.verify_chain(incremental=True).ok
    assert audit.verify_chain().ok
    # An unkeyed entry before the key is still tamper-evident (the first keyed one links it).
    raw(f"UPDATE {T} SET actor = %s WHERE seq = 2", ["someone else"])
    assert (audit.verify_chain().first_break.seq, audit.verify_chain().first_break.kind) == (
        2, "entry altered")


def test_one_more_unkeyed_entry_is_detected(plant):
    n = ChainEntry.objects.count() - 3
    _as_if_keyed_after(n)
    assert audit.verify_chain().ok
    _rewrite(audit.entry_hash, scheme_of=lambda e: ChainEntry.SHA256 if e.seq <= n + 1
             else ChainEntry.HMAC_SHA256)
    brk = audit.verify_chain().first_break
    assert (brk.seq, brk.kind) == (n + 1, "entry altered")


def test_widening_the_unkeyed_range_in_sql_breaks_the_seal(plant):
    n = ChainEntry.objects.count() - 3
    _as_if_keyed_after(n)
    _rewrite(audit.entry_hash, scheme_of=lambda e: ChainEntry.SHA256)
    raw("UPDATE register_chaincheckpoint SET unkeyed_until = %s", [10 ** 6])
    result = audit.verify_chain(incremental=True)
    assert result.full  # an altered checkpoint is not used
    assert result.first_break.kind == "checkpoint altered"
    # and it is not sealed again by the check that found it
    assert audit.verify_chain().first_break.kind == "checkpoint altered"
    raw("UPDATE register_chaincheckpoint SET seq = 1")  # moving the checkpoint: the same
    assert audit.verify_chain(incremental=True).first_break.kind == "checkpoint altered"


def _anchor_lines():
    path = Path(settings.CHAIN_ANCHOR_FILE)
    return [json.loads(x) for x in path.read_text().splitlines()] if path.exists() else []


def test_a_full_check_anchors_the_head_and_the_beat_task_does_too(plant):
    sif, lead = plant
    result = audit.verify_chain()
    [line] = _anchor_lines()
    assert (line["seq"], line["hash"]) == (result.head_seq, result.head_hash)
    assert line["chain"] == ChainEntry.objects.get(seq=1).entry_hash
    audit.verify_chain(incremental=True)
    assert len(_anchor_lines()) == 1  # a check from the checkpoint does not
    services.update_design(sif, lead, reason="Faster valve", reference="CR-3",
                           changes={"safe_state": "Outlet closed"})
    out = anchor_chain.delay().get()
    assert out["anchored"] and out["head_seq"] > result.head_seq
    assert _anchor_lines()[-1]["seq"] == out["head_seq"]
    assert settings.CELERY_BEAT_SCHEDULE["chain-anchor"]["task"] == anchor_chain.name


def test_cutting_entries_off_the_end_is_detected_by_the_anchors(plant):
    assert audit.verify_chain().ok
    head = ChainEntry.objects.order_by("-seq").first()
    keep = ChainEntry.objects.order_by("-seq")[2]
    raw(f"DELETE FROM {T} WHERE seq > %s", [keep.seq])
    raw("UPDATE register_chainhead SET last_seq = %s, last_hash = %s",
        [keep.seq, keep.entry_hash])
    # The cut leaves a chain that links and hashes on its own (only the history rows it
    # no longer covers show) ...
    path = Path(settings.CHAIN_ANCHOR_FILE)
    saved = path.read_text()
    path.unlink()
    assert audit.verify_chain(record=False).first_break.kind == "entry missing"
    path.write_text(saved)
    # ... but not against the anchor.
    brk = audit.verify_chain().first_break
    assert (brk.seq, brk.kind) == (head.seq, "entries cut off")
    assert f"ends at entry #{keep.seq}" in brk.detail
    # (and the page's check, in full while the chain is found broken, says the same)
    brk = audit.verify_chain(incremental=True).first_break
    assert (brk.seq, brk.kind) == (head.seq, "entries cut off")


def test_a_rewritten_anchored_entry_and_an_altered_anchor_are_detected(plant):
    result = audit.verify_chain()
    # Even with the key: the anchored entry now has another hash.
    e = ChainEntry.objects.get(seq=result.head_seq)
    e.actor = "someone else"
    raw(f"UPDATE {T} SET actor = %s, entry_hash = %s WHERE seq = %s",
        [e.actor, audit.entry_hash(e.prev_hash, e), e.seq])
    raw("UPDATE register_chainhead SET last_hash = %s", [audit.entry_hash(e.prev_hash, e)])
    raw("UPDATE register_chaincheckpoint SET seq = 0")  # and the checkpoint out of the way
    brk = audit.verify_chain(record=False).first_break
    assert brk.kind in ("checkpoint altered", "anchored entry changed")
    path = Path(settings.CHAIN_ANCHOR_FILE)
    ChainCheckpoint.objects.all().delete()
    brk = audit.verify_chain(record=False).first_break
    assert (brk.seq, brk.kind) == (result.head_seq, "anchored entry changed")
    # A forged anchor line (no key) is named as such.
    line = json.loads(path.read_text())
    path.write_text(json.dumps({**line, "seq": line["seq"] + 50}) + "\n")
    brk = audit.verify_chain(record=False).first_break
    assert (brk.kind, brk.object_id) == ("anchor altered", "line 1")


def test_anchors_of_another_chain_are_left_alone(plant):
    anchors.write_anchor(10 ** 6, "f" * 64, chain="another database's first entry")
    assert audit.verify_chain().ok


def test_production_refuses_to_start_without_a_chain_key():
    env = {**os.environ, "DJANGO_SETTINGS_MODULE": "config.settings.production",
           "SECRET_KEY": "x" * 20 + "a-long-random-test-secret-value-0123456789",
           "ALLOWED_HOSTS": "ledger.example.invalid"}
    env.pop("CHAIN_KEY", None)
    env.pop("DJANGO_ALLOW_ASYNC_UNSAFE", None)
    out = subprocess.run([sys.executable, "manage.py", "check"], cwd=ROOT, env=env,
                         capture_output=True, text=True)
    assert out.returncode != 0 and "CHAIN_KEY" in out.stderr
