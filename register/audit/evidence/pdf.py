"""The pack's PDF report (reportlab, DejaVu Sans embedded)."""

from __future__ import annotations

import functools
import io
from pathlib import Path
from types import SimpleNamespace

from register import presenters
from register.audit.evidence import chart
from register.audit.evidence.collect import (
    ACHIEVED_FORMULA,
    DESIGN_FORMULA,
    OBSERVED_METHOD,
    _g,
    _iso,
)
from register.audit.evidence.merge import merge
from register.presenters import CAUTION

# ---------------------------------------------------------------------------------------
# The PDF report (reportlab, DejaVu Sans embedded)
# ---------------------------------------------------------------------------------------

FONT_DIR = Path("/usr/share/fonts/truetype/dejavu")
_fonts_ready = False


def _fonts():
    global _fonts_ready
    if _fonts_ready:
        return
    from reportlab.lib.fonts import addMapping
    from reportlab.pdfbase import pdfmetrics
    from reportlab.pdfbase.ttfonts import TTFont

    pdfmetrics.registerFont(TTFont("DejaVu", str(FONT_DIR / "DejaVuSans.ttf")))
    pdfmetrics.registerFont(TTFont("DejaVu-Bold", str(FONT_DIR / "DejaVuSans-Bold.ttf")))
    addMapping("DejaVu", 0, 0, "DejaVu")
    addMapping("DejaVu", 1, 0, "DejaVu-Bold")
    addMapping("DejaVu", 0, 1, "DejaVu")
    addMapping("DejaVu", 1, 1, "DejaVu-Bold")
    _fonts_ready = True


def _esc(text) -> str:
    from xml.sax.saxutils import escape

    return escape("" if text is None else str(text))


@functools.cache
def _kit() -> SimpleNamespace:
    """Styles and the table helpers, made once per process."""
    _fonts()
    from reportlab import rl_config
    from reportlab.lib import colors

    rl_config.canvas_basefontname = "DejaVu"
    # Streams stored binary (zlib) rather than ASCII85 text as well: the pack is a zip, the
    # PDF never travels as text, and the pure-Python ASCII85 step took a third of the
    # time of writing the report's charts and pages.
    rl_config.useA85 = 0
    from reportlab.lib.enums import TA_LEFT
    from reportlab.lib.pagesizes import A4
    from reportlab.lib.styles import ParagraphStyle
    from reportlab.lib.units import mm
    from reportlab.platypus import (
        CondPageBreak,
        KeepTogether,
        Paragraph,
        Spacer,
        Table,
        TableStyle,
    )

    base = ParagraphStyle("body", fontName="DejaVu", fontSize=8.5, leading=10.5,
                          alignment=TA_LEFT)
    small = ParagraphStyle("small", parent=base, fontSize=7.2, leading=8.6)
    h1 = ParagraphStyle("h1", parent=base, fontName="DejaVu-Bold", fontSize=15, leading=19,
                        spaceAfter=6)
    h2 = ParagraphStyle("h2", parent=base, fontName="DejaVu-Bold", fontSize=11.5, leading=14,
                        spaceBefore=4, spaceAfter=4, keepWithNext=1)
    h3 = ParagraphStyle("h3", parent=base, fontName="DejaVu-Bold", fontSize=9.5, leading=12,
                        spaceBefore=6, spaceAfter=2, keepWithNext=1)
    caution = ParagraphStyle("caution", parent=base, fontSize=9.5, leading=12.5,
                             borderColor=colors.black, borderWidth=1, borderPadding=6,
                             spaceBefore=8, spaceAfter=10)
    width = A4[0] - 30 * mm

    def P(text, style=small):
        return Paragraph(_esc(text), style)

    from reportlab.lib.utils import simpleSplit
    from reportlab.pdfbase.pdfmetrics import stringWidth

    pad = 2.5

    def cell(text, room: float, style=small, bold=False):
        # A text that fits its column on one line is drawn as a plain string in the cell
        # (the same font, size and leading as the paragraph it would be): laying out a
        # paragraph per cell was most of the time of writing a SIF's pages.
        # A longer one is broken into lines at its spaces here (reportlab's simpleSplit,
        # the same greedy rule as a paragraph's) and drawn as lines of plain text; only a
        # word wider than its column still goes through a paragraph (which splits words).
        text = "" if text is None else str(text)
        font = "DejaVu-Bold" if bold else style.fontName
        if "\n" not in text:
            if stringWidth(text, font, style.fontSize) <= room:
                return text
            lines = simpleSplit(text, font, style.fontSize, room)
            if all(stringWidth(line, font, style.fontSize) <= room for line in lines):
                return "\n".join(lines)
        return Paragraph(f"<b>{_esc(text)}</b>", style) if bold else P(text, style)

    def table(header, rows, widths, empty="None in the period."):
        if not rows:
            return [Paragraph(_esc(empty), base)]
        rooms = [w * width - 2 * pad - 0.5 for w in widths]
        data = [[cell(h, room, bold=True) for h, room in zip(header, rooms, strict=True)]]
        data += [[cell(c, room) if isinstance(c, str) or c is None else c
                  for c, room in zip(r, rooms, strict=False)] for r in rows]
        t = Table(data, colWidths=[w * width for w in widths], repeatRows=1)
        t.setStyle(TableStyle([
            ("FONT", (0, 0), (-1, 0), "DejaVu-Bold", small.fontSize, small.leading),
            ("FONT", (0, 1), (-1, -1), small.fontName, small.fontSize, small.leading),
            ("GRID", (0, 0), (-1, -1), 0.4, colors.black),
            ("BACKGROUND", (0, 0), (-1, 0), colors.Color(0.88, 0.88, 0.88)),
            ("VALIGN", (0, 0), (-1, -1), "TOP"),
            ("LEFTPADDING", (0, 0), (-1, -1), pad), ("RIGHTPADDING", (0, 0), (-1, -1), pad),
            ("TOPPADDING", (0, 0), (-1, -1), 1.5), ("BOTTOMPADDING", (0, 0), (-1, -1), 1.5),
        ]))
        return [t]

    def kv(rows):
        rooms = (0.3 * width - 8, 0.7 * width - 8)
        t = Table([[cell(k, rooms[0], base), cell(v, rooms[1], base)] for k, v in rows],
                  colWidths=[0.3 * width, 0.7 * width])
        t.setStyle(TableStyle([("VALIGN", (0, 0), (-1, -1), "TOP"),
                               ("FONT", (0, 0), (-1, -1), base.fontName, base.fontSize,
                                base.leading),
                               ("LINEBELOW", (0, 0), (-1, -1), 0.25, colors.grey),
                               ("LEFTPADDING", (0, 0), (-1, -1), 2)]))
        return t

    return SimpleNamespace(base=base, small=small, h1=h1, h2=h2, h3=h3, caution=caution,
                           width=width, P=P, table=table, kv=kv, mm=mm, A4=A4,
                           CondPageBreak=CondPageBreak, KeepTogether=KeepTogether,
                           Paragraph=Paragraph, Spacer=Spacer)


def load_fonts_and_styles() -> None:
    """Register the fonts and make the styles now (else on the first pack of a process)."""
    _kit()


def _cover_story(cover: dict, sifs: list[dict]) -> list:
    """The cover: the pack's facts, the caution, how to read it, the summary."""
    k = _kit()
    base, h1, h2, h3, caution, table, kv, Paragraph, Spacer = (
        k.base, k.h1, k.h2, k.h3, k.caution, k.table, k.kv, k.Paragraph, k.Spacer)
    chain = cover["chain"]
    story = [Paragraph("Evidence pack", h1),
             Paragraph(_esc(cover["scope_label"]), h2),
             kv([("Site", f"{cover['site']} ({cover['site_code']})"),
                 ("Scope", cover["scope_label"]),
                 ("Period", f"{cover['period_start']} to {cover['period_end']} (inclusive)"),
                 ("Generated by", cover["generated_by"]),
                 ("Generated at", cover["generated_at"]),
                 ("Pack number", str(cover["pack_id"])),
                 ("Change chain head", (f"entry #{chain['head_seq']}, hash "
                                       f"{chain['head_hash']}")),
                 ("Change chain verified", (
                     "yes, every entry recomputed from the history"
                     if chain.get("verified_from_seq", 1) <= 1 else
                     f"yes, entries from #{chain['verified_from_seq']} recomputed from the "
                     "history (the ones before were verified earlier and counted now)")
                  if chain["verified_ok"] else f"NO - {chain['first_break']}"),
                 ("Chain anchored outside the database", (
                     f"entry #{chain['anchor']['seq']} at {chain['anchor']['at']}, hash "
                     f"{chain['anchor']['hash']} ({chain['anchor']['file']})")
                  if chain.get("anchor") else "not yet"),
                 ("Safety functions in the pack", str(len(sifs)))]),
             Paragraph("<b>Caution:</b> " + _esc(CAUTION), caution),
             Paragraph("How to read this pack", h3),
             Paragraph(_esc(
                 "Design PFDavg: " + DESIGN_FORMULA + "; the method of each subsystem's figure "
                 "is named with it. Achieved PFDavg: " + ACHIEVED_FORMULA + ". "
                 + OBSERVED_METHOD + ". A SIF meets its target only when every criterion of "
                 "its verdict passes (design, achieved and observed over the last 12 months, "
                 "projected to the next due test, architecture, systematic capability); one "
                 "failing criterion means it does not meet its target, and a criterion that "
                 "cannot be calculated leaves it not shown to meet its target. "
                 "The compliance summary uses the latest stored assessment of each SIF "
                 "(its date is shown); the achieved PFDavg over the period is recomputed "
                 "for this pack. Names of performers and verifiers are as signed on the "
                 "records. Overdue periods come from the test plan states at each month end "
                 "of the period and at its last day. Design changes are history entries "
                 "with a change reason. The CSV files and pack.json hold the same facts; "
                 "manifest.json lists every file with its SHA-256 and size."), base),
             Spacer(1, 6), Paragraph("Summary of compliance", h2)]
    rows = []
    for e in sifs:
        a = e["assessment"] or {}
        rows.append([e["tag"], e["name"], (f"SIL {e['target_sil']}\n"
                     f"{_g(e.get('target_pfd_avg'))}"),
                     _g(a.get("design_pfd_avg")), _g(a.get("achieved_pfd_avg_12m")),
                     _g(a.get("observed_unavailability_12m")),
                     _g(e.get("period_achieved_pfd_avg")),
                     a["verdict_label"] if a else "no assessment",
                     (a.get("computed_at") or "-")])
    story += table(["SIF", "Name", "Target", "Design PFDavg", "Achieved, 12 months",
                    "Observed, 12 months", "Achieved, period", "Verdict", "Assessed at"], rows,
                   [0.1, 0.19, 0.09, 0.09, 0.1, 0.1, 0.09, 0.11, 0.13],
                   empty="No SIF in scope.")
    return story


def _sif_story(e: dict, chart_data: dict | None) -> list:
    """One SIF's pages (from a new page): facts, target, architecture, figures and
    their chart, and what happened in the period."""
    k = _kit()
    base, small, h1, h2, h3, width, P, table, kv = (
        k.base, k.small, k.h1, k.h2, k.h3, k.width, k.P, k.table, k.kv)
    CondPageBreak, KeepTogether, Paragraph, Spacer = (
        k.CondPageBreak, k.KeepTogether, k.Paragraph, k.Spacer)
    story = [Paragraph(_esc(f"{e['tag']}  {e['name']}"), h1)]
    story.append(kv([("Unit", e["unit"]), ("Safe state", e["safe_state"]),
                     ("Mode", e["demand_mode"]), ("Life stage", e["life_stage"]),
                     ("In service since", e["in_service_on"] or "-"),
                     ("Target", f"SIL {e['target_sil']}, required PFDavg "
                                f"{_g(e.get('target_pfd_avg'))}"
                      + (" (set on the SIF)" if e["target_pfd_avg_set"] is not None
                         else " (from LOPA)"))]))
    story.append(Paragraph("Target: LOPA derivation", h2))
    if not e["lopa"]:
        story.append(Paragraph("No LOPA scenario is linked to this SIF.", base))
    for sc in e["lopa"]:
        story.append(Paragraph(_esc(f"Scenario {sc['scenario']}"
                                    + (" (governing)" if sc["governing"] else "")), h3))
        story += table(["Step", "Value"], [[s["step"], _g(s["value"], ".3g")]
                                           for s in sc["steps"]], [0.8, 0.2])
        story.append(P(f"Outcome: {sc['outcome']}", base))
    story.append(Paragraph("Architecture and data basis", h2))
    story += table(["Subsystem", "Role", "Voting", "β", "βD", "MTTR (h)", "MRT (h)"],
                   [[s["name"], s["role"], s["voting"], _g(s["beta"], "g"),
                     _g(s["beta_d"], "g"), _g(s["mttr_hours"], "g"),
                     _g(s["mrt_hours"], "g")] for s in e["subsystems"]],
                   [0.25, 0.17, 0.1, 0.1, 0.1, 0.14, 0.14])
    story.append(Spacer(1, 4))
    story += table(["Component", "Subsystem", "Device type", "λDU /h", "λDD /h", "λS /h",
                    "Basis and source", "In service"],
                   [[c["tag"], c["subsystem"], c["device_type"],
                     _g(c["lambda_du_per_hour"]), _g(c["lambda_dd_per_hour"]),
                     _g(c["lambda_s_per_hour"]),
                     f"{c['data_basis']}; rates from {c['rates_from']}: {c['source']}",
                     c["in_service_on"]] for c in e["components"]],
                   [0.11, 0.1, 0.15, 0.08, 0.08, 0.08, 0.28, 0.12])
    story.append(Paragraph("PFDavg: design and achieved", h2))
    a = e["assessment"]
    if a is None:
        story.append(Paragraph("No stored assessment.", base))
    else:
        subs = (a.get("detail") or {}).get("subsystems", [])
        methods = "; ".join(f"{s.get('name')}: {s['pfd_method']}" for s in subs
                            if s.get("pfd_method")) or DESIGN_FORMULA
        story.append(kv([
            ("Verdict", f"{a['verdict_label']}. {a['verdict_summary']}"),
            ("Design PFDavg", f"{_g(a['design_pfd_avg'])} - method: {methods}"),
            ("Achieved PFDavg, last 12 months", (f"{_g(a['achieved_pfd_avg_12m'])} - "
                                                f"{ACHIEVED_FORMULA}")),
            ("Observed unavailability, last 12 months",
             f"{_g(a['observed_unavailability_12m'])} (beside the achieved PFDavg "
             f"{_g(a['achieved_pfd_avg_12m'])})"),
            ("Achieved PFDavg since in service", _g(a["achieved_since_service_pfd_avg"])),
            ("Observed unavailability since in service", _g(a["observed_since_service"])),
            ("Achieved PFDavg over the pack period",
             _g(e.get("period_achieved_pfd_avg"))
             + (f" (window {e['period_window'][0]} to {e['period_window'][1]})"
                if e.get("period_window") else "")),
            ("Limits", (f"architecture SIL {a['architectural_sil'] or '-'}, systematic "
                        f"SC {a['systematic_sil'] or '-'}, achieved SIL "
                        f"{a['achieved_sil'] or '-'}")),
            ("Failure-rate basis", a["rate_basis_label"]),
            ("Assessment", (f"computed {a['computed_at']}, as of {a['as_of']}, trigger "
                           f"'{a['trigger']}', rate basis {a['rate_basis'] or '-'}, inputs "
                           f"digest {a['inputs_digest'][:16]}…")),
        ]))
        lines = presenters.verdict_lines_from(a["verdict"])
        story.append(Paragraph("Verdict: every criterion", h3))
        story += table(["Criterion", "Result", "Why"],
                       [[x["label"], x["badge"].label.upper() if x["status"] == "fail"
                         else x["badge"].label, x["reason"]] for x in lines],
                       [0.36, 0.12, 0.52], empty=presenters.LEGACY_NOTE)
        story.append(Paragraph("Design, achieved and observed per subsystem", h3))
        story += table(["Subsystem", "Design PFDavg", "Method of the design figure",
                        "Achieved 12 m", "Observed 12 m", "What drives the difference"],
                       [[f"{s.get('name')} ({s.get('voting')})", _g(s.get("design_pfd_avg")),
                         s.get("pfd_method") or DESIGN_FORMULA,
                         _g(s.get("achieved_pfd_avg")),
                         _g(s.get("observed_unavailability")),
                         Paragraph("<br/>".join("• " + _esc(x) for x in s.get("drivers")
                                                or []) or "-", small)] for s in subs],
                       [0.13, 0.1, 0.2, 0.1, 0.1, 0.37], empty="No inputs stored.")
        for driver in presenters.sif_drivers(a.get("detail")):
            story.append(P("• " + driver, base))
        offenders = presenters.repeat_offenders(a.get("detail"))
        if offenders:
            story.append(Paragraph("Components failing far more often than their "
                                   "device type", h3))
            story += table(["Component", "Device type", "Own rate /h", "Type rate /h",
                            "Design rate /h", "Rate used /h", "Failures / hours",
                            "Why flagged"],
                           [[r.get("component"), r.get("device_type"),
                             _g(r.get("own_per_hour")), _g(r.get("type_per_hour")),
                             _g(r.get("design_per_hour")), _g(r.get("used_per_hour")),
                             f"{r.get('failures')} / {_g(r.get('hours'), '.0f')}",
                             r.get("reason") or ""] for r in offenders],
                           [0.11, 0.13, 0.09, 0.09, 0.09, 0.09, 0.1, 0.3])
        episodes = presenters.observed_episodes(a.get("detail"))
        if episodes:
            story.append(Paragraph("Periods the function could not act (observed)", h3))
            story += table(["Subsystem", "Components", "Onset between", "Found by",
                            "Restored", "Hours, last 12 months"],
                           [[ep.get("subsystem"), ", ".join(ep["components"])
                             + (" (common cause)" if ep.get("common_cause") else ""),
                             f"{_iso(ep['onset_from'])} and {_iso(ep['onset_to'])}",
                             ep.get("found_by") or "-", _iso(ep["restored_at"]),
                             _g(ep.get("hours_in_window"), ".0f")] for ep in episodes],
                           [0.12, 0.18, 0.3, 0.1, 0.17, 0.13])
        story.append(Paragraph("Inputs used per subsystem", h3))
        story += table(["Subsystem", "Voting", "λDU /h", "λDD /h", "β / βD", "T1 (h)",
                        "PTC", "MTTR / MRT (h)", "Design PFDavg", "Achieved 12 m"],
                       [[s.get("name"), s.get("voting"), _g(s.get("lambda_du_per_hour")),
                         _g(s.get("lambda_dd_per_hour")),
                         f"{_g(s.get('beta'), 'g')} / {_g(s.get('beta_d'), 'g')}",
                         _g(s.get("proof_test_interval_hours"), ".0f"),
                         _g(s.get("proof_test_coverage"), "g"),
                         f"{_g(s.get('mttr_hours'), 'g')} / {_g(s.get('mrt_hours'), 'g')}",
                         _g(s.get("design_pfd_avg")), _g(s.get("achieved_pfd_avg"))]
                        for s in subs],
                       [0.14, 0.07, 0.09, 0.09, 0.1, 0.09, 0.06, 0.11, 0.12, 0.13],
                       empty="No inputs stored.")
        if a["flags"]:
            story.append(Paragraph("Findings of the calculation", h3))
            for flag in a["flags"]:
                story.append(P("• " + flag, base))
    if chart_data:
        d = chart.drawing(chart_data, width)
        story += [CondPageBreak(d.height + 20), Spacer(1, 4), d]
    elif e.get("chart_note"):
        story.append(P(e["chart_note"], base))
    story.append(Paragraph("Tests in the period", h2))
    story += table(["Date", "Kind", "Performed by", "Verified by", "Status",
                    "As found → as left"],
                   [[t["performed_at"], t["kind"]
                     + (f" (corrects #{t['supersedes']}: {t['correction_reason']})"
                        if t["supersedes"] else "")
                     + (f" (superseded by #{t['superseded_by']})" if t["superseded_by"]
                        else ""),
                     t["performer"] or "-", t["verifier"] or "not yet verified",
                     t["status"],
                     ", ".join(f"{r['component']}: {r['as_found']}→{r['as_left']}"
                               for r in t["results"])]
                    for t in e["tests"]],
                   [0.14, 0.16, 0.13, 0.13, 0.12, 0.32])
    story.append(Paragraph("Failures found and how they were closed", h2))
    story += table(["Found", "Source", "Component", "Failure", "Description",
                    "Work done", "As left"],
                   [[f["found_on"], f["source"], f["component"], f["failure_mode"],
                     f["description"], f["work_done"] or "-", f["as_left"] or "-"]
                    for f in e["failures"]],
                   [0.12, 0.13, 0.12, 0.15, 0.21, 0.19, 0.08])
    section = [Paragraph("Demands", h2)]
    section += table(["Occurred", "Result", "Description", "Failed components",
                      "Recorded by"],
                     [[d["occurred_at"], ("spurious trip" if d["spurious"] else
                                          "acted as required" if d["successful"]
                                          else "FAILED"), d["description"],
                       ", ".join(d["failed_components"]) or "-", d["recorded_by"]]
                      for d in e["demands"]], [0.15, 0.13, 0.4, 0.15, 0.17])
    story.append(KeepTogether(section))
    story.append(Paragraph("Bypasses", h2))
    story += table(["Started", "Ended", "Duration (h)", "Allowed (h)", "Bypassed",
                    "Reason", "Requested / authorised by", "Compensating measures"],
                   [[b["started_at"], (b["ended_at"] or "still open")
                     + (f" ({b['closed_by']})" if b.get("closed_by") else ""),
                     f"{b['duration_hours']:.1f}"
                     + (" - over authorised time" if b["over_authorised"] else ""),
                     _g(b["authorised_hours"], "g"), b["component"], b["reason"],
                     f"{b.get('requested_by') or '-'} / "
                     + (f"{b['authorised_by']}, {b['authorised_at']}" if b["authorised_by"]
                        else str(b.get("authorisation", "not authorised")).upper()),
                     (b["compensating_measures"] or "none")
                     + (" (equivalent)" if b["measures_effective"] else "")]
                    for b in e["bypasses"]],
                   [0.12, 0.12, 0.1, 0.08, 0.09, 0.17, 0.11, 0.21])
    story.append(Paragraph("Findings and their follow-up", h2))
    story += table(["Found", "Component", "Found by", "Owner", "Corrective work",
                    "Retest due", "Status"],
                   [[f["found_at"], f["component"], f["found_by"], f["owner"] or "-",
                     f["corrective_action"] or "-", f["retest_due_on"] or "not planned",
                     f["status"] + (f", {f['age_days']} d" if not f["closed_at"] else
                                    f" {f['closed_at']} by {f['closed_by'] or '-'}")
                     + (f": retest {f['retest']}" if f["retest"] else "")
                     + (f": {f['closure_note']}" if f["closure_note"] else "")]
                    for f in e.get("findings", [])],
                   [0.13, 0.1, 0.14, 0.11, 0.2, 0.1, 0.22])
    story.append(Paragraph("Deferrals", h2))
    story += table(["Plan", "Due", "Proposed", "Reason", "Requested", "Decision"],
                   [[d["plan"], d["due_on"], d["proposed_on"], d["reason"],
                     f"{d['requested_by']}, {d['requested_at']}",
                     f"{d['status']}"
                     + (f" by {d['decided_by']}, {d['decided_at']}" if d["decided_by"]
                        else "")
                     + (f": {d['decision_note']}" if d["decision_note"] else "")
                     + (f" (projected PFDavg {d['projected_pfd_avg']:.2e})"
                        if d["projected_pfd_avg"] else "")]
                    for d in e["deferrals"]],
                   [0.14, 0.1, 0.1, 0.24, 0.17, 0.25])
    story.append(Paragraph("Overdue periods", h2))
    story += table(["Plan", "Due on", "Overdue from", "Overdue until",
                    "Days overdue by then", "Worst state"],
                   [[o["plan"], o["due_on"] + (" (deferred)" if o["deferred"] else ""),
                     o["overdue_from"], o["overdue_to"],
                     str(o["days_overdue"]), o["worst_state"]]
                    for o in e["overdue"]],
                   [0.22, 0.16, 0.16, 0.16, 0.12, 0.18],
                   empty="No test plan was overdue on any day of the period.")
    story.append(Paragraph("Design changes", h2))
    story += table(["When", "Record", "By", "Reason", "What changed"],
                   [[c["at"], f"{c['record']} ({c['action']})", c["by"] or "-",
                     c["reason"], c["what_changed"]] for c in e["changes"]],
                   [0.13, 0.18, 0.13, 0.22, 0.34])
    return story


def _footer(cover: dict) -> str:
    return (f"Evidence pack {cover['pack_id']} · {cover['site']} · {cover['period_start']} "
            f"to {cover['period_end']} · chain head {cover['chain']['head_hash'][:16]}…")


def _part(cover: dict, story: list) -> bytes:
    """One part of the report as a PDF of its own: footer and caution on every page, the
    page number left to ``join`` (written with ``rl_config.invariant``: the same facts give
    the same bytes, whichever process writes them)."""
    from reportlab import rl_config
    from reportlab.platypus import SimpleDocTemplate

    k = _kit()
    footer = _footer(cover)

    def on_page(canvas, doc):
        canvas.saveState()
        canvas.setFont("DejaVu", 7)
        canvas.drawString(15 * k.mm, 9 * k.mm, footer)
        canvas.drawString(15 * k.mm, 5.5 * k.mm, "Caution: " + CAUTION)
        canvas.restoreState()

    buf = io.BytesIO()
    doc = SimpleDocTemplate(buf, pagesize=k.A4, leftMargin=15 * k.mm, rightMargin=15 * k.mm,
                            topMargin=14 * k.mm, bottomMargin=16 * k.mm)
    invariant, rl_config.invariant = rl_config.invariant, 1
    try:
        doc.build(story, onFirstPage=on_page, onLaterPages=on_page)
    finally:
        rl_config.invariant = invariant
    return buf.getvalue()


def cover_part(cover: dict, sifs: list[dict]) -> bytes:
    """The cover and the compliance summary of all ``sifs``, as a PDF part."""
    return _part(cover, _cover_story(cover, sifs))


def sif_part(cover: dict, entry: dict, chart_data: dict | None) -> bytes:
    """One SIF's pages as a PDF part; ``chart_data`` is its chart's series
    (``chart.series``), drawn here as vector graphics."""
    return _part(cover, _sif_story(entry, chart_data))


def _page_numbers(count: int) -> bytes:
    """``count`` pages holding nothing but "page N" where the footer has it."""
    from reportlab import rl_config
    from reportlab.pdfgen.canvas import Canvas

    k = _kit()
    buf = io.BytesIO()
    compression, invariant = rl_config.pageCompression, rl_config.invariant
    rl_config.pageCompression, rl_config.invariant = 0, 1  # merge renames its font
    try:
        c = Canvas(buf, pagesize=k.A4, pageCompression=0, invariant=1)
        for page in range(1, count + 1):
            c.setFont("DejaVu", 7)
            c.drawRightString(k.A4[0] - 15 * k.mm, 9 * k.mm, f"page {page}")
            c.showPage()
        c.save()
    finally:
        rl_config.pageCompression, rl_config.invariant = compression, invariant
    return buf.getvalue()


def join(cover: dict, parts: list[bytes]) -> bytes:
    """The report: ``parts`` (the cover's, then each SIF's) in order, pages numbered."""
    stamp = cover["generated_at"][:16].replace("-", "").replace(" ", "").replace(":", "")
    return merge(parts, _page_numbers, {
        "Title": f"Evidence pack {cover['pack_id']}", "Author": cover["generated_by"],
        "Subject": cover["scope_label"], "CreationDate": f"D:{stamp}00+00'00'"})


def render_pdf(cover: dict, sifs: list[dict], charts: dict[int, dict], progress=None) -> bytes:
    """The whole report in one process: the cover, one part per SIF (``charts``: SIF id ->
    chart series), joined."""
    parts = [cover_part(cover, sifs)]
    n = len(sifs)
    for i, e in enumerate(sifs):
        parts.append(sif_part(cover, e, charts.get(e["id"])))
        if progress and (i % 20 == 0 or i == n - 1):
            progress(0.9 * (i + 1) / max(n, 1))
    data = join(cover, parts)
    if progress:
        progress(1.0)
    return data
