"""Verifying the change chain from a checkpoint: what the check from the checkpoint sees,
what only the full check sees, the page with its full-check button, and the evidence pack
using the checkpoint too."""

import datetime as dt

import pytest
from django.test import Client
from django.urls import reverse
from django.utils import timezone

from register import choices, services
from register.audit import chain as audit
from register.audit import evidence
from register.models import (
    ChainCheckpoint,
    ChainEntry,
    Component,
    EvidencePack,
    SafetyFunction,
)
from tests import factories as f
from tests.register.tamper import raw

pytestmark = pytest.mark.django_db

T = ChainEntry._meta.db_table


@pytest.fixture
def plant():
    s = f.site()
    sif = f.sif(f.unit(s))
    people = {
        "lead": f.user("lead", site=s, role=choices.Role.LEAD),
        "auditor": f.user("aud", site=s, role=choices.Role.AUDITOR),
        "tech": f.user("tech", site=s, role=choices.Role.TECHNICIAN),
    }
    return s, sif, people


def _write(sif, who, text="Inlet closed"):
    """One more change to chain: the SIF's safe state."""
    services.update_design(sif, who, reason="Changed valve", reference="CR-7",
                           changes={"safe_state": text})


def _rehash(seq: int, **changes) -> str:
    """Change an entry's fields in SQL and give it the hash its new fields make, as someone
    covering their tracks would; returns the new hash."""
    e = ChainEntry.objects.get(seq=seq)
    for name, value in changes.items():
        setattr(e, name, value)
    new = audit.entry_hash(e.prev_hash, e)
    sets = ", ".join(f"{name} = %s" for name in changes)
    raw(f"UPDATE {T} SET {sets}, entry_hash = %s WHERE seq = %s",
        [*changes.values(), new, seq])
    return new


def test_the_check_goes_on_from_the_checkpoint_and_moves_it(plant):
    _s, sif, people = plant
    assert ChainCheckpoint.objects.filter(seq__gt=0).count() == 0
    full = audit.verify_chain(incremental=True)  # no checkpoint yet: in full
    assert full.ok and full.full and full.from_seq == 0
    cp = ChainCheckpoint.objects.get()
    assert (cp.seq, cp.entry_hash) == (full.head_seq, full.head_hash)
    assert cp.full_verified_at == full.checked_at and cp.full_verified_ok

    _write(sif, people["lead"])
    later = audit.verify_chain(incremental=True)
    assert later.ok and not later.full and later.from_seq == full.head_seq
    assert later.head_seq > full.head_seq
    assert later.entries == ChainEntry.objects.count() == later.history_rows
    cp.refresh_from_db()
    assert (cp.seq, cp.entry_hash) == (later.head_seq, later.head_hash)
    assert cp.full_verified_at == full.checked_at  # the full check's time stays

    # An entry after the checkpoint that was tampered with is found from the checkpoint.
    _write(sif, people["lead"], "second")
    target = ChainEntry.objects.filter(seq__gt=cp.seq).order_by("seq").first()
    raw(f"UPDATE {T} SET actor = %s WHERE seq = %s", ["someone else", target.seq])
    brk = audit.verify_chain(incremental=True).first_break
    assert (brk.seq, brk.kind) == (target.seq, "entry altered")
    cp.refresh_from_db()
    assert cp.seq == later.head_seq  # a broken check does not move the checkpoint


def test_a_tampered_entry_before_the_checkpoint_is_found_by_the_full_check(plant):
    _s, sif, people = plant
    _write(sif, people["lead"])
    assert audit.verify_chain().ok
    head = ChainCheckpoint.objects.get().seq
    victim = head // 2
    raw(f"UPDATE {T} SET reason = %s WHERE seq = %s", ["rewritten", victim])
    # The check from the checkpoint starts at the head: it cannot see that far back.
    assert audit.verify_chain(incremental=True).ok
    full = audit.verify_chain()
    assert not full.ok and (full.first_break.seq, full.first_break.kind) == (
        victim, "entry altered")
    cp = ChainCheckpoint.objects.get()
    assert cp.full_verified_ok is False and cp.full_verified_at == full.checked_at
    # Once the full check found it broken, every check is a full one until it holds again.
    again = audit.verify_chain(incremental=True)
    assert again.full and not again.ok and again.first_break.seq == victim


def test_a_history_row_changed_before_the_checkpoint_is_found_by_the_full_check(plant):
    _s, sif, people = plant
    assert audit.verify_chain().ok
    _write(sif, people["lead"])
    # The SIF's first history row (no longer its latest, which the live row is compared
    # with), rewritten in place before the checkpoint.
    Hist = SafetyFunction.history.model
    h = Hist.objects.filter(id=sif.pk).order_by("history_id").first()
    raw(f"UPDATE {Hist._meta.db_table} SET name = 'Low level trip' WHERE history_id = %s",
        [h.history_id])
    assert audit.verify_chain(incremental=True).ok
    brk = audit.verify_chain().first_break
    assert brk.kind == "content changed" and brk.history_id == h.history_id


def test_deletions_before_the_checkpoint_are_counted(plant):
    _s, sif, people = plant
    _write(sif, people["lead"])
    assert audit.verify_chain().ok
    Hist = Component.history.model
    h = Hist.objects.order_by("history_id").first()
    raw(f"DELETE FROM {Hist._meta.db_table} WHERE history_id = %s", [h.history_id])
    brk = audit.verify_chain(incremental=True).first_break
    assert (brk.kind, brk.history_id, brk.model) == ("history row deleted", h.history_id,
                                                     "register.HistoricalComponent")


def test_a_changed_checkpoint_entry_is_noticed(plant):
    _s, sif, people = plant
    _write(sif, people["lead"])
    assert audit.verify_chain().ok
    cp = ChainCheckpoint.objects.get()
    # A field changed without touching the hash: the entry no longer gives its hash.
    raw(f"UPDATE {T} SET actor = %s WHERE seq = %s", ["someone else", cp.seq])
    brk = audit.verify_chain(incremental=True).first_break
    assert (brk.seq, brk.kind) == (cp.seq, "entry altered")
    # Rewritten with a hash that fits its new fields (and the head made to agree): the hash
    # differs from the one verified at the checkpoint.
    new = _rehash(cp.seq, actor="someone else", reason="rewritten")
    raw("UPDATE register_chainhead SET last_hash = %s", [new])
    brk = audit.verify_chain(incremental=True).first_break
    assert (brk.seq, brk.kind) == (cp.seq, "entry altered")
    assert cp.entry_hash in brk.detail
    # Removed altogether.
    raw(f"DELETE FROM {T} WHERE seq = %s", [cp.seq])
    brk = audit.verify_chain(incremental=True).first_break
    assert (brk.seq, brk.kind) == (cp.seq, "entry missing")


def test_chain_page_checks_from_the_checkpoint_and_offers_the_full_check(plant):
    _s, sif, people = plant
    assert audit.verify_chain().ok
    first_full = ChainCheckpoint.objects.get().full_verified_at
    _write(sif, people["lead"])
    client = Client(enforce_csrf_checks=True)
    client.force_login(people["auditor"])
    page = client.get(reverse("audit:chain"))
    body = page.content.decode()
    result = page.context["result"]
    assert result.ok and not result.full
    assert f"from entry #{result.from_seq}" in body
    assert "Last verified in full" in body and first_full.strftime("%Y-%m-%d %H:%M:%S") in body
    url = reverse("audit:chain_verify_full")
    assert f'action="{url}"' in body

    assert client.post(url).status_code == 403  # no CSRF token
    assert ChainCheckpoint.objects.get().full_verified_at == first_full
    assert client.get(url).status_code == 405
    token = page.cookies["csrftoken"].value if "csrftoken" in page.cookies else \
        client.cookies["csrftoken"].value
    resp = client.post(url, {"csrfmiddlewaretoken": token}, follow=True)
    assert resp.redirect_chain[-1] == (reverse("audit:chain"), 302)
    cp = ChainCheckpoint.objects.get()
    assert cp.full_verified_at > first_full and cp.full_verified_ok
    assert cp.seq == ChainEntry.objects.order_by("-seq").first().seq
    assert "verified from its first entry" in resp.content.decode()

    tech = Client()
    tech.force_login(people["tech"])
    assert tech.post(url).status_code == 403
    anonymous = Client().post(url)
    assert anonymous.status_code == 302 and "login" in anonymous["Location"]
    assert ChainCheckpoint.objects.get().full_verified_at == cp.full_verified_at


def test_the_full_check_button_reports_a_break(plant):
    _s, _sif, people = plant
    assert audit.verify_chain().ok
    raw(f"UPDATE {T} SET actor = %s WHERE seq = 2", ["someone else"])
    client = Client()
    client.force_login(people["lead"])
    resp = client.post(reverse("audit:chain_verify_full"), follow=True)
    body = resp.content.decode()
    assert "broken at entry #2" in body and "Broken." in body
    assert ChainCheckpoint.objects.get().full_verified_ok is False


def test_evidence_pack_checks_from_the_checkpoint(plant, settings, tmp_path):
    settings.VAR_DIR = tmp_path
    s, sif, people = plant
    assert audit.verify_chain().ok
    full_at = ChainCheckpoint.objects.get().full_verified_at
    _write(sif, people["lead"])
    today = timezone.localdate()
    pack = EvidencePack.objects.create(scope="site", site=s, requested_by=people["auditor"],
                                       period_start=today - dt.timedelta(days=30),
                                       period_end=today)
    pack = evidence.run(pack.pk)
    assert pack.status == "done" and pack.chain_ok
    cp = ChainCheckpoint.objects.get()
    head = ChainEntry.objects.order_by("-seq").first()
    assert pack.chain_head_seq == cp.seq and pack.chain_head_hash == cp.entry_hash
    assert cp.full_verified_at == full_at  # checked from the checkpoint, not in full
    assert cp.seq <= head.seq
