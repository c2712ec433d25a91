"""Exports of the register: the list for people to read, and the writers every export uses.

* :func:`neutralise`: the one rule for text cells a spreadsheet program could take for a
  formula (a leading ``=``, ``+``, ``-``, ``@``, tab or carriage return gets a single quote
  in front). Every export calls it, the evidence pack's CSV files included; numbers, dates
  and empty cells are left as they are.
* :func:`csv_stream` / :func:`xlsx_file`: a header and rows into CSV chunks (for a
  streaming response) or into a workbook whose sheet is written row by row into the zip.
* :func:`people_rows`: the register list exactly as ``/sifs/`` shows it (the same
  ``SifFilter``, the same order), one row per SIF, read as plain values in one query
  whatever the number of SIFs.
"""

from __future__ import annotations

import csv
import datetime as dt
import html
import tempfile
import zipfile
from collections.abc import Iterable, Iterator
from types import SimpleNamespace

from django.db.models import Count, IntegerField, OuterRef, Subquery, Value
from django.db.models.functions import Coalesce
from django.template.loader import render_to_string
from django.utils import timezone
from django.utils.html import strip_tags
from openpyxl.cell.cell import ILLEGAL_CHARACTERS_RE
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
    starts = frozenset(FORMULA_STARTS)  # neutralise's rule, inlined: it runs per cell
    for row in rows:
        lines.append(writer.writerow([
            "'" + v if v.__class__ is str and v and v[0] in starts else v for v in row]))
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


_BOLD, _DATE = 1, 2  # the styles the workbook defines (besides the default, 0)
_XML = '<?xml version="1.0" encoding="UTF-8" standalone="yes"?>\n'
_MAIN = "http://schemas.openxmlformats.org/spreadsheetml/2006/main"
_REL = "http://schemas.openxmlformats.org/officeDocument/2006/relationships"
_PARTS = {
    "[Content_Types].xml": (
        '<Types xmlns="http://schemas.openxmlformats.org/package/2006/content-types">'
        '<Default Extension="rels" ContentType="application/vnd.openxmlformats-package.'
        'relationships+xml"/><Default Extension="xml" ContentType="application/xml"/>'
        '<Override PartName="/xl/workbook.xml" ContentType="application/vnd.openxmlformats-'
        'officedocument.spreadsheetml.sheet.main+xml"/><Override PartName="/xl/worksheets/'
        'sheet1.xml" ContentType="application/vnd.openxmlformats-officedocument.'
        'spreadsheetml.worksheet+xml"/><Override PartName="/xl/styles.xml" ContentType='
        '"application/vnd.openxmlformats-officedocument.spreadsheetml.styles+xml"/></Types>'),
    "_rels/.rels": (
        '<Relationships xmlns="http://schemas.openxmlformats.org/package/2006/relationships">'
        f'<Relationship Id="rId1" Type="{_REL}/officeDocument" Target="xl/workbook.xml"/>'
        '</Relationships>'),
    "xl/_rels/workbook.xml.rels": (
        '<Relationships xmlns="http://schemas.openxmlformats.org/package/2006/relationships">'
        f'<Relationship Id="rId1" Type="{_REL}/worksheet" Target="worksheets/sheet1.xml"/>'
        f'<Relationship Id="rId2" Type="{_REL}/styles" Target="styles.xml"/>'
        '</Relationships>'),
    "xl/styles.xml": (
        f'<styleSheet xmlns="{_MAIN}"><numFmts count="1"><numFmt numFmtId="164" '
        'formatCode="yyyy-mm-dd"/></numFmts><fonts count="2"><font><sz val="11"/>'
        '<name val="Calibri"/></font><font><b/><sz val="11"/><name val="Calibri"/></font>'
        '</fonts><fills count="2"><fill><patternFill patternType="none"/></fill><fill>'
        '<patternFill patternType="gray125"/></fill></fills><borders count="1"><border>'
        '<left/><right/><top/><bottom/><diagonal/></border></borders><cellStyleXfs count="1">'
        '<xf numFmtId="0" fontId="0" fillId="0" borderId="0"/></cellStyleXfs><cellXfs '
        'count="3"><xf numFmtId="0" fontId="0" fillId="0" borderId="0" xfId="0"/><xf '
        'numFmtId="0" fontId="1" fillId="0" borderId="0" xfId="0" applyFont="1"/><xf '
        'numFmtId="164" fontId="0" fillId="0" borderId="0" xfId="0" applyNumberFormat="1"/>'
        '</cellXfs><cellStyles count="1"><cellStyle name="Normal" xfId="0" builtinId="0"/>'
        '</cellStyles></styleSheet>'),
}
_EPOCH = dt.date(1899, 12, 30)  # day 0 of a workbook's date serial numbers (1900 system)
_INFINITE = (float("inf"), float("-inf"))
#: Distinct texts whose cell XML a workbook keeps while writing (then it starts again).
TEXTS_KEPT = 20_000
_ESCAPES = str.maketrans({"&": "&amp;", "<": "&lt;", ">": "&gt;"})


def _xml_cell(ref: str, value, style: int = 0) -> str:
    """One cell of a sheet's XML: text inline (neutralised, characters a workbook cannot
    hold removed), numbers, truth values and dates; '' for an empty cell."""
    value = _cell_value(value)
    s = f' s="{style}"' if style else ""
    if value is None or value == "":
        return ""
    if isinstance(value, str):
        text = value.translate(_ESCAPES)
        space = ' xml:space="preserve"' if text[:1].isspace() or text[-1:].isspace() else ""
        return f'<c r="{ref}" t="inlineStr"{s}><is><t{space}>{text}</t></is></c>'
    if isinstance(value, bool):
        return f'<c r="{ref}" t="b"{s}><v>{int(value)}</v></c>'
    if isinstance(value, int | float):
        return "" if value != value else f'<c r="{ref}"{s}><v>{value!r}</v></c>'
    if isinstance(value, dt.datetime):
        value = value.date() if value.tzinfo is None else value.astimezone(dt.UTC).date()
    if isinstance(value, dt.date):
        return f'<c r="{ref}" s="{_DATE}"><v>{(value - _EPOCH).days}</v></c>'
    return _xml_cell(ref, str(value), style)


def xlsx_file(title: str, header: list[str], rows: Iterable[Iterable], *,
              heading: list[str] = (), widths: list[int] | None = None):
    """A workbook of one sheet, its XML written row by row straight into the zip (nothing
    but the current rows in memory), in an open temporary file at its start: the
    ``heading`` lines, a blank row, the header row (bold, frozen), then the rows. Text is
    written inline (no table of shared strings that would grow with the file)."""
    letters = [get_column_letter(i) for i in range(1, len(header) + 1)]
    widths = widths or [max(12, len(h) + 2) for h in header]
    row_of_header = len(heading) + (1 if heading else 0) + 1
    out = tempfile.TemporaryFile()  # noqa: SIM115 (handed open to the response)
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED, compresslevel=3) as archive:
        for name, xml in _PARTS.items():
            archive.writestr(name, _XML + xml)
        archive.writestr("xl/workbook.xml", _XML + (
            f'<workbook xmlns="{_MAIN}" xmlns:r="{_REL}"><sheets><sheet name='
            f'"{html.escape(title[:31])}" sheetId="1" r:id="rId1"/></sheets></workbook>'))
        with archive.open("xl/worksheets/sheet1.xml", "w", force_zip64=True) as sheet:
            cols = "".join(f'<col min="{i}" max="{i}" width="{w}" customWidth="1"/>'
                           for i, w in enumerate(widths, start=1))
            sheet.write((
                f'{_XML}<worksheet xmlns="{_MAIN}"><sheetViews><sheetView workbookViewId='
                f'"0"><pane ySplit="{row_of_header}" topLeftCell="A{row_of_header + 1}" '
                f'activePane="bottomLeft" state="frozen"/></sheetView></sheetViews>'
                f'<cols>{cols}</cols><sheetData>').encode())
            lines = [f'<row r="{n}">{_xml_cell(f"A{n}", line)}</row>'
                     for n, line in enumerate(heading, start=1)]
            n = row_of_header
            lines.append(f'<row r="{n}">' + "".join(
                _xml_cell(f"{c}{n}", h, _BOLD) for c, h in zip(letters, header)) + "</row>")
            # Cells of the rows below the header carry no reference (they follow each
            # other; an empty one is <c/>), so a repeated text's whole cell is kept.
            texts: dict[str, str] = {"": "<c/>"}
            for n, row in enumerate(rows, start=row_of_header + 1):
                parts = [f'<row r="{n}">']
                for v in row:
                    kind = type(v)
                    if kind is str:
                        cell = texts.get(v)
                        if cell is None:
                            if len(texts) > TEXTS_KEPT:
                                texts.clear()  # memory stays bounded, whatever the file
                                texts[""] = "<c/>"
                            cell = texts[v] = _xml_cell("", v).replace(' r=""', "", 1) or "<c/>"
                        parts.append(cell)
                    elif v is None:
                        parts.append("<c/>")
                    elif (kind is float or kind is int) and v == v and v not in _INFINITE:
                        parts.append(f"<c><v>{v!r}</v></c>")
                    else:
                        parts.append(_xml_cell("", v).replace(' r=""', "", 1) or "<c/>")
                parts.append("</row>")
                lines.append("".join(parts))
                if len(lines) >= 500:
                    sheet.write("".join(lines).encode())
                    lines = []
            sheet.write(("".join(lines) + "</sheetData></worksheet>").encode())
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
