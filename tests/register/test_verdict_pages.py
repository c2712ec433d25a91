"""The verdict names every criterion: the SIF page, the overview counts and their lists,
the register list, the PFD(t) chart and the evidence pack all read the stored verdict.

Assessments are stored directly here with the keys the calculation side writes
(``verdict`` from ``calcs.engine.verdict.judge``, ``detail["subsystems"]`` with
``pfd_method`` and ``drivers``, ``detail["rates"]``, ``detail["observed_episodes"]``):
these tests are about the display layer, not the calculation.
"""

from __future__ import annotations

import datetime as dt
import json
import re
import zipfile

import pytest
from django.db import transaction
from django.urls import reverse
from django.utils import timezone
from django.utils.html import escape

from calcs.engine import verdict as eng_verdict
from calcs.models import Assessment
from register import choices
from register.audit import evidence
from register.models import Component, EvidencePack, SafetyFunction
from tests import factories as f
from tests.register.test_evidence_pack import _pdf_text

pytestmark = pytest.mark.django_db
NOW = timezone.now()
TARGET = 5e-3
FIELD_BASIS_LABEL = str(choices.RateBasis.FIELD.label)
OBS_REASON = "observed unavailability over the last 12 months 7.10e-03 is above the target 5.00e-03"
SENSING_DRIVER = "LT-S-OBS-A was found failed at the proof test of 60 days ago; its onset is unknown"
SIF_DRIVER = "Observed unavailability is above the achieved PFDavg: two failures found in 12 months"
MARKOV = "exact Markov model"
SIMPLIFIED = "simplified equations (IEC 61508-6 Annex B)"


def _iso(days_ago: float) -> str:
    return (NOW - dt.timedelta(days=days_ago)).isoformat()


def _rates(sif, offenders=()):
    rows = []
    for c in Component.objects.filter(subsystem__sif=sif).select_related("device_type"):
        flagged = c.tag in offenders
        rows.append({"component": c.tag, "component_id": c.pk, "device_type": c.device_type.name,
                     "design_per_hour": c.lambda_du, "type_per_hour": c.lambda_du * 1.4,
                     "own_per_hour": c.lambda_du * (9.0 if flagged else 1.0),
                     "used_per_hour": c.lambda_du * (6.0 if flagged else 1.1),
                     "failures": 3 if flagged else 0, "hours": 26280.0,
                     "repeat_offender": flagged,
                     "reason": (f"{c.tag}: 3 dangerous failures in 3.0 years where its type "
                                "suggests 0.2" if flagged else "")})
    return rows


def _store(sif, *, minutes: int, design=1e-3, achieved=2e-3, observed=1.5e-3, projected=3e-3,
           arch=2, sc=3, offenders=(), episodes=(), drivers=(), sub_drivers=None):
    """One stored assessment with its verdict judged by the engine's one rule."""
    v = eng_verdict.judge(target_sil=sif.target_sil, target_pfd_avg=TARGET,
                          design_pfd_avg=design, achieved_pfd_avg_12m=achieved,
                          observed_unavailability_12m=observed, projected_pfd_avg=projected,
                          architectural_sil=arch, systematic_capability=sc)
    subs = []
    for sub in sif.subsystems.order_by("position"):
        subs.append({"name": sub.name, "voting": sub.voting,
                     "design_pfd_avg": design / 2, "achieved_pfd_avg": achieved / 2,
                     "observed_unavailability": observed / 2,
                     "pfd_method": MARKOV if sub.role == "final" else SIMPLIFIED,
                     "drivers": list((sub_drivers or {}).get(sub.name, []))})
    at = NOW + dt.timedelta(minutes=minutes)
    return Assessment.objects.create(
        sif=sif, computed_at=at, as_of=at, inputs_digest="0" * 64, trigger="test",
        target_pfd_avg=TARGET, target_sil=sif.target_sil, design_pfd_avg=design,
        achieved_pfd_avg=achieved, achieved_since_service_pfd_avg=achieved,
        observed_unavailability=observed, observed_since_service=observed / 3,
        projected_pfd_avg=projected, architectural_sil=arch, systematic_sil=sc,
        meets_target=v.meets, verdict=v.as_dict(), rate_basis=choices.RateBasis.FIELD,
        flags=[], detail={"subsystems": subs, "rates": _rates(sif, offenders),
                          "observed_episodes": list(episodes), "drivers": list(drivers)})


EPISODE = {"subsystem": "sensing", "components": ["LT-S-OBS-A"], "onset_from": _iso(430),
           "onset_to": _iso(60), "restored_at": _iso(59), "hours_in_window": 61.0,
           "common_cause": False, "found_by": "full test"}


@pytest.fixture(scope="module")
def plant(django_db_setup, django_db_blocker):
    """Built once for the module inside a transaction rolled back at its end.

    Unit C1: S-PASS meets (its older assessment did not), S-OBS fails on the observed
    unavailability and has two repeat offenders, S-UNK has a criterion not calculable,
    S-NONE has no assessment, S-OLD is decommissioned (fails, one offender: not counted).
    Unit C2: S-ARCH fails on the architecture and has one repeat offender.
    """
    with django_db_blocker.unblock(), transaction.atomic():
        site = f.site("fenwick")
        c1, c2 = f.unit(site, "C1"), f.unit(site, "C2")
        lead = f.user("fen_lead", site=site, role=choices.Role.LEAD)
        sifs = {tag: f.sif(u, tag=tag, target_pfd=TARGET, in_service=dt.date(2021, 3, 1),
                           voting="1oo2" if tag == "S-OBS" else "1oo1")
                for tag, u in (("S-PASS", c1), ("S-OBS", c1), ("S-UNK", c1), ("S-NONE", c1),
                               ("S-OLD", c1), ("S-ARCH", c2))}
        SafetyFunction.objects.filter(pk=sifs["S-OLD"].pk).update(
            life_stage=choices.LifeStage.DECOMMISSIONED)
        _store(sifs["S-PASS"], minutes=1, achieved=9e-3)  # older, did not meet
        _store(sifs["S-PASS"], minutes=2)
        _store(sifs["S-OBS"], minutes=2, observed=7.1e-3, episodes=[EPISODE],
               offenders=("LT-S-OBS-A", "XV-S-OBS-A"), drivers=[SIF_DRIVER],
               sub_drivers={"sensing": [SENSING_DRIVER]})
        _store(sifs["S-UNK"], minutes=2, projected=None)
        _store(sifs["S-OLD"], minutes=2, design=8e-3, offenders=("LT-S-OLD-A",))
        _store(sifs["S-ARCH"], minutes=2, arch=1, offenders=("LT-S-ARCH-A",))
        yield {"site": site, "c1": c1, "c2": c2, "lead": lead, **sifs}
        transaction.set_rollback(True)


@pytest.fixture
def lead_client(client, plant):
    client.force_login(plant["lead"])
    return client


def _page(client, sif) -> str:
    resp = client.get(reverse("register:sif_detail", args=[sif.pk]))
    assert resp.status_code == 200
    return resp.content.decode()


def _row(html: str, attr: str) -> str:
    m = re.search(r"<tr[^>]*" + re.escape(attr) + r"[^>]*>(.*?)</tr>", html, re.S)
    assert m, attr
    return m.group(1)


def _list_tags(client, url: str) -> set[str]:
    html = client.get(url.replace("&amp;", "&")).content.decode()
    tags = set(re.findall(r'<a href="/sifs/\d+/">([^<]+)</a>', html))
    shown = int(re.search(r"<strong>(\d+)</strong> SIF", html).group(1))
    assert shown == len(tags), url
    return tags


def test_sif_page_names_every_criterion_and_the_overall_verdict(lead_client, plant):
    html = _page(lead_client, plant["S-PASS"])
    assert "Caution:" in html
    for key in eng_verdict.CRITERIA:
        row = _row(html, f'data-criterion="{key}"')
        assert eng_verdict.LABELS[key] in row
        assert ">pass<" in row
    assert re.search(r'data-verdict="meets">\s*<span class="badge badge-ok">meets target</span>',
                     html)
    assert "Meets its target: every criterion holds." in html
    assert "does not meet target" not in html
    # Design, achieved and observed per subsystem, with the method of the design figure.
    final = _row(html, 'data-subsystem="final"')
    assert re.findall(r"\d\.\d\de-\d\d", final) == ["5.00e-04", "1.00e-03", "7.50e-04"]
    assert MARKOV in final
    assert SIMPLIFIED in _row(html, 'data-subsystem="sensing"')
    assert f'data-rate-basis="field">{escape(FIELD_BASIS_LABEL)}<' in html
    # Its older assessment failed; the page shows the newest only.
    assert "9.00e-03" not in html


def test_one_failing_line_means_does_not_meet_with_its_reason(lead_client, plant):
    html = _page(lead_client, plant["S-OBS"])
    assert re.search(r'data-verdict="fails">\s*<span class="badge badge-fail">does not meet '
                     r"target</span>", html)
    row = _row(html, 'data-criterion="observed_12m"')
    assert 'class="line-fail"' in html and ">fail<" in row and OBS_REASON in row
    assert "Does not meet its target: " + OBS_REASON + "." in html
    for key in set(eng_verdict.CRITERIA) - {"observed_12m"}:
        assert ">pass<" in _row(html, f'data-criterion="{key}"')
    # What drives it, for the SIF and for the subsystem concerned.
    assert SIF_DRIVER in html
    assert SENSING_DRIVER in re.search(r'data-drivers="sensing">(.*?)</ul>', html, re.S).group(1)
    # The episode: onset between the last test that would have revealed it and the finding.
    assert f"{(NOW - dt.timedelta(days=430)):%Y-%m-%d} and {(NOW - dt.timedelta(days=60)):%Y-%m-%d}" in html


def test_a_criterion_not_calculable_leaves_it_not_shown_to_meet(lead_client, plant):
    html = _page(lead_client, plant["S-UNK"])
    assert re.search(r'data-verdict="unknown">\s*<span class="badge badge-neutral">not shown to '
                     r"meet its target</span>", html)
    assert ">not calculable<" in _row(html, 'data-criterion="projected"')
    assert "no full proof test is due (no plan)" in html
    html = _page(lead_client, plant["S-NONE"])
    assert "No calculation stored yet for this SIF: it is not shown to meet its target." in html


def test_repeat_offenders_on_the_sif_page_with_own_and_type_rate(lead_client, plant):
    html = _page(lead_client, plant["S-OBS"])
    comp = Component.objects.get(tag="LT-S-OBS-A")
    row = _row(html, 'data-offender="LT-S-OBS-A"')
    assert "repeat offender" in row and comp.device_type.name in row
    assert f"{comp.lambda_du * 9.0:.2e}" in row  # its own rate
    assert f"{comp.lambda_du * 1.4:.2e}" in row  # its type's plant-wide rate
    assert f"{comp.lambda_du * 6.0:.2e}" in row  # the rate the calculation used
    assert "3 dangerous failures in 3.0 years" in row
    assert 'data-offender="XV-S-OBS-A"' in html
    assert 'data-offender="LT-S-OBS-B"' not in html
    assert "3 components rated, 2 failing far more often than their device type." in html
    assert "repeat offender" not in _page(lead_client, plant["S-PASS"])


def test_overview_counts_equal_the_lists_their_links_open(lead_client, plant):
    html = lead_client.get("/").content.decode()
    site = plant["site"].pk
    c1, c2 = plant["c1"].pk, plant["c2"].pk
    links = re.findall(r'href="(/sifs/\?[^"]*(?:meets=\w+|life_stage=current))">'
                       r'(?:<span class="big">)?(\d+)<', html)
    assert len(links) == 4 + 2 * 4  # SIFs, meet, do not meet, not shown: site and two units
    for href, number in links:
        assert len(_list_tags(lead_client, href)) == int(number), href
    expected = {f"site={site}&amp;meets=yes": 1, f"site={site}&amp;meets=no": 2,
                f"site={site}&amp;meets=unknown": 2, f"site={site}&amp;life_stage=current": 5,
                f"unit={c1}&amp;meets=no": 1, f"unit={c1}&amp;meets=unknown": 2,
                f"unit={c2}&amp;meets=no": 1, f"unit={c2}&amp;meets=yes": 0}
    found = {h.split("?", 1)[1]: int(n) for h, n in links}
    for query, n in expected.items():
        assert found[query] == n, query
    assert _list_tags(lead_client, f"/sifs/?unit={c1}&meets=no") == {"S-OBS"}
    assert _list_tags(lead_client, f"/sifs/?site={site}&meets=unknown") == {"S-UNK", "S-NONE"}
    assert _list_tags(lead_client, f"/sifs/?site={site}&meets=yes") == {"S-PASS"}


def test_overview_counts_repeat_offenders_and_links_to_their_sifs(lead_client, plant):
    html = lead_client.get("/").content.decode()
    site, c1 = plant["site"].pk, plant["c1"].pk
    card = re.search(r'data-figure="repeat-offenders">(.*?)</div>', html, re.S).group(1)
    # Three components in the latest assessments (the decommissioned SIF's is not counted).
    assert '<span class="big">3</span>components failing far more often' in card
    assert f'href="/sifs/?site={site}&amp;repeat_offender=true">in 2 SIFs<' in card
    assert _list_tags(lead_client, f"/sifs/?site={site}&repeat_offender=true") == {
        "S-OBS", "S-ARCH"}
    assert 'data-repeat="2"' in html  # unit C1: the two of S-OBS
    assert f'href="/sifs/?unit={c1}&amp;repeat_offender=true">in 1 SIF<' in html
    assert _list_tags(lead_client, f"/sifs/?unit={c1}&repeat_offender=true") == {"S-OBS"}
    assert "S-OBS" not in _list_tags(lead_client, f"/sifs/?site={site}&repeat_offender=false")


def test_register_list_shows_the_stored_verdict(lead_client, plant):
    html = lead_client.get(f"/sifs/?unit={plant['c1'].pk}").content.decode()
    rows = dict(re.findall(r'<a href="/sifs/\d+/">([^<]+)</a>.*?<span class="badge [^"]+">'
                           r"((?:meets|does not meet|not shown)[^<]*)</span>", html, re.S))
    assert rows["S-PASS"] == "meets target"
    assert rows["S-OBS"] == "does not meet target"
    assert rows["S-UNK"] == rows["S-NONE"] == "not shown to meet its target"


def test_pfd_chart_shades_the_observed_episode(lead_client, plant):
    svg = lead_client.get(reverse("register:sif_chart", args=[plant["S-OBS"].pk, "pfd"]))
    assert svg["Content-Type"] == "image/svg+xml"
    assert b"failed channel: possible onset to restoration" in svg.content
    assert b"failure found" in svg.content
    plain = lead_client.get(reverse("register:sif_chart", args=[plant["S-PASS"].pk, "pfd"]))
    assert b"failed channel" not in plain.content


def test_evidence_pack_carries_the_verdict_line_by_line(plant, settings, tmp_path):
    settings.VAR_DIR = tmp_path
    sif = plant["S-OBS"]
    pack = EvidencePack.objects.create(scope="sif", site=plant["site"], sif=sif,
                                       requested_by=plant["lead"],
                                       period_start=timezone.localdate() - dt.timedelta(days=365),
                                       period_end=timezone.localdate())
    pack = evidence.run(pack.pk)
    assert pack.status == "done", pack.error
    with zipfile.ZipFile(tmp_path / pack.result_path) as zf:
        files = {n: zf.read(n) for n in zf.namelist()}
    text = _pdf_text(files["report.pdf"], tmp_path)
    assert "Meets target" not in text
    assert "Verdict does not meet target. Does not meet its target: " + OBS_REASON in text
    assert "Verdict: every criterion" in text
    stored = Assessment.objects.filter(sif=sif).latest()
    for line in stored.verdict["lines"]:
        words = line["label"].split()
        assert " ".join(words[:3]) in text, line["label"]
        assert line["reason"].split(" is ")[0] in text
    assert "FAIL" in text
    assert "Observed unavailability, last 12 months 7.10e-03 (beside the achieved PFDavg 2.00e-03)" in text
    assert MARKOV in text and SIMPLIFIED in text
    assert FIELD_BASIS_LABEL in text
    assert "LT-S-OBS-A" in text and "3 dangerous failures in 3.0 years" in text
    assert SENSING_DRIVER in text
    assert ("results support, and do not replace, a functional safety assessment by "
            "competent persons under iec 61511 and local regulations") in text.lower()
    # The same facts in the CSV and JSON files.
    criteria = files["criteria.csv"].decode().splitlines()
    assert len(criteria) == 1 + len(eng_verdict.CRITERIA)
    assert any(r.startswith(f"{sif.tag},observed_12m,") and ",fail," in r for r in criteria)
    entry = json.loads(files["pack.json"])["sifs"][0]
    assert entry["assessment"]["verdict"]["meets"] is False
    assert entry["assessment"]["verdict_label"] == "does not meet target"
    assert entry["assessment"]["observed_unavailability_12m"] == pytest.approx(7.1e-3)
    sifs_csv = files["sifs.csv"].decode()
    assert "does not meet target" in sifs_csv and "observed_unavailability_12m" in sifs_csv
    png = next(v for k, v in files.items() if k.startswith("charts/"))
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    (tmp_path / "episode-chart.png").write_bytes(png)
