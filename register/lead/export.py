"""Exports of the register: the list for people to read, and the writers every export uses.

* :func:`neutralise`: the one rule for text cells a spreadsheet program could take for a
  formula (a leading ``=``, ``+``, ``-``, ``@``, tab or carriage return gets a single quote
  in front). Every export calls it, the evidence pack's CSV files included; numbers, dates
  and empty cells are left as they are.
* :func:`csv_stream` / :func:`xlsx_file`: a header and rows into CSV chunks (for a
  streaming response) or into a workbook written in openpyxl's write-only mode.
* :func:`people_rows`: the register list exactly as ``/sifs/`` shows it (the same
  ``SifFilter``, the same order), one row per SIF, read as plain values in one query
  whatever the number of SIFs.
"""

from __future__ import annotations

import csv
import datetime as dt
import tempfile
from collections.abc import Iterable, Iterator
from types import SimpleNamespace

from django.db.models import Count, IntegerField, OuterRef, Subquery, Value
from django.db.models.functions import Coalesce
from django.template.loader import render_to_string
from django.utils import timezone
from django.utils.html import strip_tags
from openpyxl import Workbook
from openpyxl.cell import WriteOnlyCell
from openpyxl.cell.cell import ILLEGAL_CHARACTERS_RE
from openpyxl.styles import Font
from openpyxl.utils import get_column_letter

from register import choices, presenters
from register.calculations import calculations
from register.days import today
from register.lead.filters import SifFilter, describe
from register.models import Bypass, Deferral

#: First characters that make a spreadsheet program read a text cell as a formula.
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")
XLSX_TYPE = "application/vnd.openxmlformats-officedocument.spreadsheetml.sheet"
CSV_TYPE = "text/csv; charset=utf-8"
#: Rows read from the database at a time (a server-side cursor on PostgreSQL).
CHUNK = 2000


def neutralise(value):
    """``value`` safe to put in a spreadsheet cell: text that would start a formula gets a
    single quote in front; anything that is not text is returned unchanged."""
    if isinstance(value, str) and value.startswith(FORMULA_STARTS):
        return "'" + value
    return value


class _Line:
    """A file-like object that hands back what the CSV writer writes."""

    def write(self, text):
        return text


def csv_stream(header: list[str], rows: Iterable[Iterable], *, bom: bool = True
               ) -> Iterator[bytes]:
    """The CSV file (UTF-8, with a byte-order mark for spreadsheet programs) in chunks of
    about a hundred rows, every text cell neutralised."""
    writer = csv.writer(_Line(), lineterminator="\n")
    lines = [("\ufeff" if bom else "") + writer.writerow([neutralise(h) for h in header])]
    for row in rows:
        lines.append(writer.writerow([neutralise(v) for v in row]))
        if len(lines) >= 100:
            yield "".join(lines).encode("utf-8")
            lines = []
    if lines:
        yield "".join(lines).encode("utf-8")


def _cell_value(value):
    value = neutralise(value)
    if isinstance(value, str):
        return ILLEGAL_CHARACTERS_RE.sub("", value)  # control characters xlsx cannot hold
    if isinstance(value, float) and value in (float("inf"), float("-inf")):
        return None
    return value


def xlsx_file(title: str, header: list[str], rows: Iterable[Iterable], *,
              heading: list[str] = (), widths: list[int] | None = None):
    """A workbook of one sheet in write-only mode (rows go to disk as they come) in an
    open temporary file, at its start: the ``heading`` lines, a blank row, the header
    row (bold), then the rows."""
    wb = Workbook(write_only=True)
    ws = wb.create_sheet(title)
    for i, width in enumerate(widths or [max(12, len(h) + 2) for h in header], start=1):
        ws.column_dimensions[get_column_letter(i)].width = width
    bold = Font(bold=True)
    for line in heading:
        ws.append([_cell_value(line)])
    if heading:
        ws.append([])
    row_of_header = len(heading) + (1 if heading else 0) + 1
    ws.freeze_panes = f"A{row_of_header + 1}"
    head = []
    for h in header:
        cell = WriteOnlyCell(ws, value=_cell_value(h))
        cell.font = bold
        head.append(cell)
    ws.append(head)
    for row in rows:
        ws.append([_cell_value(v) for v in row])
    out = tempfile.TemporaryFile()  # noqa: SIM115 (handed open to the response)
    wb.save(out)
    out.seek(0)
    return out


def caution_text() -> str:
    """The caution of every page (``templates/_caution.html``) as plain text."""
    return " ".join(strip_tags(render_to_string("_caution.html")).split())


# ---------------------------------------------------------------------------------------
# The register list for people
# ---------------------------------------------------------------------------------------

PEOPLE_COLUMNS = [
    ("Tag", 14), ("Name", 32), ("Life stage", 16), ("Unit", 10), ("Required SIL", 12),
    ("Target PFDavg", 14), ("Design PFDavg", 14), ("Achieved PFDavg (12 months)", 16),
    ("RRF (1 / achieved PFDavg)", 14), ("Verdict", 26), ("Why not meeting the target", 60),
    ("Next test due", 14), ("Test state", 22), ("Open bypasses", 10),
    ("Deferrals awaiting decision", 12),
]
PEOPLE_HEADER = [name for name, _ in PEOPLE_COLUMNS]
PEOPLE_WIDTHS = [width for _, width in PEOPLE_COLUMNS]
_FIELDS = ("tag", "name", "life_stage", "unit__code", "target_sil", "latest_target",
           "latest_design", "latest_achieved", "latest_id", "latest_meets", "latest_verdict",
           "next_due", "worst_state", "open_bypasses", "pending_deferrals")


def _count_of(rows, group: str):
    """How many of ``rows`` (correlated to the SIF) there are, 0 for none."""
    counted = rows.order_by().values(group).annotate(n=Count("pk")).values("n")
    return Coalesce(Subquery(counted, output_field=IntegerField()), Value(0))


def people_queryset(f: SifFilter):
    """The filter's SIFs in the list's order, as plain values (one query)."""
    verdict = calculations().Assessment.objects.filter(pk=OuterRef("latest_id"))
    return f.qs.annotate(
        latest_verdict=Subquery(verdict.values("verdict")[:1]),
        open_bypasses=_count_of(Bypass.objects.filter(sif_id=OuterRef("pk"),
                                                      ended_at__isnull=True), "sif_id"),
        pending_deferrals=_count_of(Deferral.objects.filter(
            plan__sif_id=OuterRef("pk"), status=choices.DeferralStatus.PENDING),
            "plan__sif_id"),
    ).values_list(*_FIELDS)


def _reason(latest_id, meets, verdict) -> str:
    if latest_id is None:
        return "Not calculated"
    if meets is True:
        return ""
    return presenters.verdict_summary(SimpleNamespace(verdict=verdict, meets_target=meets))


def _rrf(pfd):
    """Risk reduction factor: 1 / PFDavg by its definition (IEC 61511-1 clause 3, from
    memory; the engine's ``sil.rrf`` is the same); none for a missing or zero figure."""
    return 1.0 / pfd if pfd else None


def _person_row(values, stages) -> list:
    (tag, name, stage, unit, sil, target, design, achieved, latest_id, meets, verdict, due,
     state, bypasses, deferrals) = values
    return [tag, name, str(stages.get(stage, stage)), unit, sil, target, design, achieved,
            _rrf(achieved), presenters.verdict_badge(meets).label.capitalize(),
            _reason(latest_id, meets, verdict), due,
            str(choices.plan_state_badge(state)["label"]), bypasses, deferrals]


def people_rows(f: SifFilter) -> Iterator[list]:
    """One row of :data:`PEOPLE_HEADER` per SIF of the list, in the list's order. The
    filter runs here; the rows are read as they are consumed."""
    qs = people_queryset(f)
    stages = dict(choices.LifeStage.choices)
    return (_person_row(values, stages) for values in qs.iterator(chunk_size=CHUNK))


def people_heading(f: SifFilter, count: int) -> list[str]:
    """What the file counts: the list's filter in words, the date, the caution."""
    shown = describe(f)
    what = f"{count} SIF{'s' if count != 1 else ''}" + (
        " where " + "; ".join(shown) if shown else " (no filter)")
    sort = f.form.cleaned_data.get("sort") if f.form.is_valid() else None
    labels = dict(f.form.fields["sort"].choices)
    order = ", ".join(str(labels.get(s, s)) for s in sort) if sort else "site, unit and tag"
    return [
        "SIF register",
        f"Counted: {what}",
        f"Sorted by: {order}",
        f"As of: {today().isoformat()} (test states for that day on each site's calendar; "
        "figures from each SIF's latest stored calculation); exported "
        f"{timezone.now().astimezone(dt.UTC):%Y-%m-%d %H:%M} UTC",
        caution_text(),
    ]


def people_csv(f: SifFilter, wrap=None) -> Iterator[bytes]:
    """The list as CSV chunks; ``wrap(rows)``, if given, sees the rows on their way."""
    rows = people_rows(f)
    return csv_stream(PEOPLE_HEADER, wrap(rows) if wrap else rows)


def people_xlsx(f: SifFilter, wrap=None):
    count = f.qs.count()
    rows = people_rows(f)
    return xlsx_file("SIF register", PEOPLE_HEADER, wrap(rows) if wrap else rows,
                     heading=people_heading(f, count), widths=PEOPLE_WIDTHS)
