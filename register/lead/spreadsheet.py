"""Import and export of a site's SIF list, components and test history (.xlsx or .csv).

One table, the same in both formats (see README, "Spreadsheet columns"): the first
column, ``record``, says what a row describes (``sif``, ``component`` or ``test``), and
each kind of row fills the columns it needs. An import is checked completely first
(:func:`plan_import` lists, row by row, what would be created or changed and every
error with its row and column); only a file without errors is written, in one
transaction, through the models' ``full_clean()`` and ``register.services``
(:func:`apply_import`). Exporting and importing the same file changes nothing.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import logging
import math
import re
import zipfile
from collections import OrderedDict
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field

from django.conf import settings
from django.core.exceptions import PermissionDenied, ValidationError
from django.db import DEFAULT_DB_ALIAS, DatabaseError, connection, connections, transaction
from django.db.models import OuterRef, Subquery
from django.utils import timezone
from openpyxl import load_workbook
from openpyxl.utils import get_column_letter

from register import choices, job_lease, services
from register.calculations import calculations
from register.days import check_plausible
from register.lead import export as writers
from register.models import (
    MAX_TEXT,
    Component,
    ComponentResult,
    DeviceType,
    ImportJob,
    PlantUnit,
    SafetyFunction,
    Site,
    Subsystem,
    TestPlan,
    TestRecord,
    in_force,
)
from register.permissions import Action, require
from register.rules import result_problems
from register.schedule import followup

log = logging.getLogger(__name__)

COLUMNS = [
    "record", "unit", "sif_tag", "sif_name", "safe_state", "demand_mode", "target_sil",
    "target_pfd_avg", "life_stage", "in_service_on", "proof_test_interval_months",
    "subsystem", "role", "voting", "beta", "beta_d", "component_tag", "device_type",
    "lambda_du", "lambda_dd", "lambda_s", "rate_unit", "proof_test_coverage",
    "partial_test_coverage", "test_performed_at", "test_kind", "as_found", "as_left",
    "failure_mode", "failure_description", "work_done", "remarks",
]
SHEET_NAME = "Register"
FULL_PLAN_NAME = "Full proof test"
#: A failure rate above this (per hour) is refused as implausible: 1e-4 /h is 100 000 FIT,
#: a dangerous failure about once a year, far above any device fit for a SIF. A value
#: such as 500 is almost always a rate in FIT written without its unit.
FIT = 1e-9
RATE_FIELDS = {"lambda_du": "lambda_du_per_hour", "lambda_dd": "lambda_dd_per_hour",
               "lambda_s": "lambda_s_per_hour"}


# ---------------------------------------------------------------------------------------
# Export
# ---------------------------------------------------------------------------------------


def _num(value):
    return "" if value is None else value


def _iso(day):
    return day.isoformat() if day else ""


def _sif_key(prefix: str = "") -> list[str]:
    """The order of every stream of the export: unit code, SIF tag, SIF id."""
    return [f"{prefix}unit__code", f"{prefix}tag", f"{prefix}id"]


def _same_sif(stream, sif_id):
    """The rows at the head of ``stream`` (a peekable iterator of (sif id, row)) that
    belong to ``sif_id``; every stream is in the order of :func:`_sif_key`."""
    while stream[0] is not None and stream[0][0] == sif_id:
        yield stream[0][1]
        stream[0] = next(stream[1], None)


def _peekable(rows):
    it = iter(rows)
    return [next(it, None), it]


def iter_export_table(sif_queryset) -> Iterator[list]:
    """The rows for these SIFs, each a list in the order of :data:`COLUMNS` ("" for an
    empty cell): each SIF, its components, its current signed tests.

    Three queries whatever the number of SIFs, read as plain values in chunks (a
    server-side cursor on PostgreSQL) and merged by SIF: no model object is built."""
    ids = SafetyFunction.objects.filter(pk__in=sif_queryset.values("pk")).values("pk")
    interval = TestPlan.objects.filter(sif_id=OuterRef("pk"), kind=choices.TestKind.FULL
                                       ).order_by("name", "id").values("interval_months")[:1]
    sifs = (SafetyFunction.objects.filter(pk__in=ids).annotate(interval=Subquery(interval))
            .order_by(*_sif_key()).values_list(
                "pk", "unit__code", "tag", "name", "safe_state", "demand_mode", "target_sil",
                "target_pfd_avg", "life_stage", "in_service_on", "interval"))
    comps = (Component.objects.filter(subsystem__sif_id__in=ids)
             .order_by(*_sif_key("subsystem__sif__"), "subsystem__position", "subsystem_id",
                       "tag")
             .values_list("subsystem__sif_id", "subsystem__name", "subsystem__role",
                          "subsystem__voting", "subsystem__beta", "subsystem__beta_d", "tag",
                          "device_type__name", "in_service_on", "lambda_du_per_hour",
                          "lambda_dd_per_hour", "lambda_s_per_hour", "proof_test_coverage",
                          "partial_test_coverage"))
    results = (ComponentResult.objects.filter(in_force("record__"), record__sif_id__in=ids)
               .order_by(*_sif_key("record__sif__"), "record__performed_at", "record_id",
                         "component__tag")
               .values_list("record__sif_id", "component__tag", "record__performed_at",
                            "record__kind", "as_found", "as_left", "failure_mode",
                            "failure_description", "work_done", "record__remarks"))
    chunk = 5 * writers.CHUNK  # short rows: fewer round trips, still a bounded memory
    comp_stream = _peekable((r[0], r) for r in comps.iterator(chunk_size=chunk))
    test_stream = _peekable((r[0], r) for r in results.iterator(chunk_size=chunk))
    blank = [""] * len(COLUMNS)
    col = {name: i for i, name in enumerate(COLUMNS)}
    unit_, tag_ = col["unit"], col["sif_tag"]
    sif_cols = [col[c] for c in ("sif_name", "safe_state", "demand_mode", "target_sil",
                                 "target_pfd_avg", "life_stage", "in_service_on",
                                 "proof_test_interval_months")]
    comp_cols = [col[c] for c in ("subsystem", "role", "voting", "beta", "beta_d",
                                  "component_tag", "device_type", "in_service_on",
                                  "lambda_du", "lambda_dd", "lambda_s", "rate_unit",
                                  "proof_test_coverage", "partial_test_coverage")]
    test_cols = [col[c] for c in ("component_tag", "test_performed_at", "test_kind",
                                  "as_found", "as_left", "failure_mode",
                                  "failure_description", "work_done", "remarks")]

    def row(kind, unit, tag, columns, values):
        out = blank.copy()
        out[0], out[unit_], out[tag_] = kind, unit, tag
        for i, value in zip(columns, values):
            out[i] = value
        return out

    utc, last_at, last_iso = dt.UTC, None, ""
    for (pk, unit, tag, name, safe_state, mode, sil, target, stage, in_service,
         months) in sifs.iterator(chunk_size=writers.CHUNK):
        yield row("sif", unit, tag, sif_cols, (
            name, safe_state, mode, sil, _num(target), stage, _iso(in_service),
            _num(months)))
        for (_, sub, role, voting, beta, beta_d, comp_tag, dtype, since, du, dd, ls, ptc,
             partial) in _same_sif(comp_stream, pk):
            yield row("component", unit, tag, comp_cols, (
                sub, role, voting, beta, beta_d, comp_tag, dtype, _iso(since), _num(du),
                _num(dd), _num(ls), "per hour", ptc, partial))
        for (_, comp_tag, at, kind, found, left, mode_, description, work,
             remarks) in _same_sif(test_stream, pk):
            if at != last_at:  # the results of one record follow each other
                last_at, last_iso = at, at.astimezone(utc).isoformat()
            yield row("test", unit, tag, test_cols, (
                comp_tag, last_iso, kind, found, left, mode_,
                description, work, remarks))


def iter_export_rows(sif_queryset) -> Iterator[dict]:
    """:func:`iter_export_table`'s rows as {column: value}."""
    for values in iter_export_table(sif_queryset):
        yield dict(zip(COLUMNS, values))


def export_rows(sif_queryset) -> list[dict]:
    """:func:`iter_export_rows` as a list."""
    return list(iter_export_rows(sif_queryset))


def _cells(rows: Iterable[dict], empty=""):
    for row in rows:
        yield [empty if row[c] == "" else row[c] for c in COLUMNS]


def csv_chunks(rows: Iterable[dict]) -> Iterator[bytes]:
    """The table as CSV (UTF-8 with a byte-order mark), in chunks for streaming."""
    return table_csv(_cells(rows))


def xlsx_file(rows: Iterable[dict]):
    """The table as a workbook (sheet ``Register``) in an open temporary file."""
    return table_xlsx(_cells(rows, None))


def table_csv(lists: Iterable[list]) -> Iterator[bytes]:
    """:func:`csv_chunks` of rows given as lists (:func:`iter_export_table`)."""
    return writers.csv_stream(COLUMNS, lists)


def table_xlsx(lists: Iterable[list]):
    """:func:`xlsx_file` of rows given as lists (an empty text is an empty cell)."""
    return writers.xlsx_file(SHEET_NAME, COLUMNS, lists)


def to_csv(rows: Iterable[dict]) -> bytes:
    return b"".join(csv_chunks(rows))


def to_xlsx(rows: Iterable[dict]) -> bytes:
    with xlsx_file(rows) as out:
        return out.read()


# ---------------------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------------------


@dataclass(frozen=True)
class CellError:
    row: int  # spreadsheet row number, the header is row 1
    column: str  # column name ("" for the whole row)
    message: str

    @property
    def letter(self) -> str:
        return get_column_letter(COLUMNS.index(self.column) + 1) if self.column in COLUMNS \
            else ""

    def __str__(self):
        where = f"row {self.row}" + (f", column {self.column} ({self.letter})"
                                     if self.column else "")
        return f"{where}: {self.message}"


class FileError(Exception):
    """The file cannot be read as a register table at all."""


#: The columns read from each row of a workbook: the table's columns and as many again for
#: blank ones between them; cells further right are not read.
MAX_COLUMNS = 2 * len(COLUMNS)
#: A workbook's parts unpacked may be at most this many times the file's size limit (a
#: compressed sheet that unpacks to gigabytes is refused before it is read).
UNPACKED_FACTOR = 20


def limits() -> tuple[int, int]:
    """(bytes, rows) an import may have: settings IMPORT_MAX_BYTES and IMPORT_MAX_ROWS."""
    return settings.IMPORT_MAX_BYTES, settings.IMPORT_MAX_ROWS


def _bounded(rows: Iterable, max_rows: int) -> list:
    """The rows of ``rows`` (header included) while there are at most ``max_rows`` below
    the header; reading stops at the first row past the limit, whatever the file says of
    its own size."""
    out = []
    for values in rows:
        if len(out) > max_rows:
            raise FileError(f"The file has more than {max_rows:,} rows below the header "
                            f"(the import limit); split it into several files.")
        out.append(values)
    return out


def _xlsx_rows(data: bytes, max_rows: int) -> list:
    max_bytes, _ = limits()
    try:
        with zipfile.ZipFile(io.BytesIO(data)) as archive:
            unpacked = sum(info.file_size for info in archive.infolist())
    except (zipfile.BadZipFile, OSError, ValueError) as exc:
        raise FileError("The file is not a readable .xlsx workbook.") from exc
    if unpacked > UNPACKED_FACTOR * max_bytes:
        raise FileError(f"The workbook unpacks to {unpacked:,} bytes, more than "
                        f"{UNPACKED_FACTOR * max_bytes:,} (the import limit).")
    try:
        wb = load_workbook(io.BytesIO(data), read_only=True, data_only=True)
        ws = wb[SHEET_NAME] if SHEET_NAME in wb.sheetnames else wb.worksheets[0]
        ws.reset_dimensions()  # the sheet's stated size is not trusted: read what is there
        return _bounded(ws.iter_rows(values_only=True, max_col=MAX_COLUMNS), max_rows)
    except FileError:
        raise
    except Exception as exc:
        raise FileError("The file is not a readable .xlsx workbook.") from exc


def _csv_rows(data: bytes, max_rows: int) -> list:
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise FileError("The CSV file is not UTF-8 text.") from exc
    try:
        return _bounded(csv.reader(io.StringIO(text, newline="")), max_rows)
    except csv.Error as exc:  # e.g. a field longer than the csv module reads
        raise FileError(f"The CSV file cannot be read: {exc}.") from exc


def read_table(filename: str, data: bytes) -> list[tuple[int, dict]]:
    """Rows as (row number, {column: text or value}); blank rows skipped.

    Refuses (:class:`FileError`) a file larger than IMPORT_MAX_BYTES or with more than
    IMPORT_MAX_ROWS rows below the header, counted while reading."""
    name = filename.lower()
    max_bytes, max_rows = limits()
    if len(data) > max_bytes:
        raise FileError(f"The file is {len(data):,} bytes; an import takes at most "
                        f"{max_bytes:,} bytes.")
    if name.endswith(".csv"):
        raw = _csv_rows(data, max_rows)
    elif name.endswith(".xlsx"):
        raw = _xlsx_rows(data, max_rows)
    else:
        raise FileError("Give a .xlsx or .csv file.")
    if not raw:
        raise FileError("The file is empty.")
    header = [str(h or "").strip().lower() for h in raw[0]]
    missing = [c for c in ("record", "unit", "sif_tag") if c not in header]
    if missing:
        raise FileError(f"Row 1 must name the columns; missing: {', '.join(missing)}.")
    unknown = [h for h in header if h and h not in COLUMNS]
    if unknown:
        shown = ", ".join(h[:40].replace("\x00", "\\0") for h in unknown[:10])
        raise FileError(f"Unknown column(s) in row 1: {shown}.")
    rows = []
    for number, values in enumerate(raw[1:], start=2):
        row = {}
        for col, value in zip(header, values):
            if not col:
                continue
            if isinstance(value, str):
                value = value.strip()
            row[col] = "" if value is None else value
        if any(v != "" for v in row.values()):
            rows.append((number, row))
    return rows


def cell_problems(number: int, cells: dict) -> list[CellError]:
    """Cells no column may hold: text with a NUL character (the database cannot store
    it) or longer than MAX_TEXT characters; numbers that are not finite."""
    out = []
    for col, value in cells.items():
        if isinstance(value, float) and not math.isfinite(value):
            out.append(CellError(number, col, f"{value!r} is not a finite number."))
        elif isinstance(value, str):
            if "\x00" in value:
                out.append(CellError(number, col, "holds a NUL character; remove it."))
            elif len(value) > MAX_TEXT:
                out.append(CellError(number, col, f"holds {len(value):,} characters; at "
                                                  f"most {MAX_TEXT:,} are taken."))
    return out


# ---------------------------------------------------------------------------------------
# Checking: what would happen, and every error
# ---------------------------------------------------------------------------------------


@dataclass
class Step:
    row: int
    action: str  # create / change / unchanged
    what: str
    detail: str = ""


@dataclass
class ImportPlan:
    steps: list[Step] = field(default_factory=list)
    errors: list[CellError] = field(default_factory=list)
    # Resolved operations, in order, for apply_import.
    sif_ops: list = field(default_factory=list)
    comp_ops: list = field(default_factory=list)
    test_ops: list = field(default_factory=list)

    @property
    def changes(self) -> int:
        return sum(1 for s in self.steps if s.action != "unchanged")


class _Row:
    """Typed access to one row's cells, collecting errors with row and column."""

    def __init__(self, number: int, cells: dict, errors: list, site=None):
        self.n, self.cells, self.errors, self.site = number, cells, errors, site

    def err(self, col, msg):
        self.errors.append(CellError(self.n, col, msg))

    def text(self, col, required=False):
        value = self.cells.get(col, "")
        if isinstance(value, float) and value.is_integer():
            value = int(value)
        value = "" if value is None else str(value).strip()
        if required and not value:
            self.err(col, "is required for this kind of row.")
        return value

    def number(self, col, *, required=False, low=None, high=None, integer=False,
               quantity=None):
        """A finite number; inside ``low`` .. ``high``, or inside the plausible range of
        ``quantity`` (a key of ``calcs.engine.units.BOUNDS``, the one table of ranges)."""
        value = self.cells.get(col, "")
        if value == "" or value is None:
            if required:
                self.err(col, "is required for this kind of row.")
            return None
        try:
            num = float(str(value).replace(",", ".")) if isinstance(value, str) \
                else float(value)
        except ValueError:
            self.err(col, f"'{value}' is not a number.")
            return None
        if not math.isfinite(num):
            self.err(col, f"'{value}' is not a finite number.")
            return None
        if quantity is not None:
            try:
                return calculations().check_number(num, quantity, col)
            except calculations().InputError as exc:
                self.err(col, f"{exc.message}.")
                return None
        if integer:
            if not num.is_integer():
                self.err(col, f"'{value}' must be a whole number.")
                return None
            num = int(num)
        if (low is not None and num < low) or (high is not None and num > high):
            self.err(col, f"{value} is outside {low:g} .. {high:g}.")
            return None
        return num

    def choice(self, col, options, required=True, default=""):
        value = self.text(col).lower()
        if not value:
            if required and not default:
                self.err(col, "is required for this kind of row.")
            return default
        if value not in options:
            self.err(col, f"'{value}' is not one of: {', '.join(options)}.")
            return None
        return value

    def date(self, col, required=False):
        value = self.cells.get(col, "")
        if isinstance(value, dt.datetime):
            return self.plausible(col, value.date())
        if isinstance(value, dt.date):
            return self.plausible(col, value)
        text = self.text(col, required)
        if not text:
            return None
        try:
            day = dt.date.fromisoformat(text[:10])
        except ValueError:
            self.err(col, f"'{text}' is not a date (write YYYY-MM-DD).")
            return None
        return self.plausible(col, day)

    def plausible(self, col, when):
        """``when`` if inside the plausible window (``register.days.check_plausible``),
        else None with the error on ``col``."""
        try:
            check_plausible(when, self.site)
        except ValidationError as exc:
            self.err(col, " ".join(exc.messages))
            return None
        return when

    def moment(self, col):
        value = self.cells.get(col, "")
        if isinstance(value, dt.datetime):
            at = value if value.tzinfo else value.replace(tzinfo=dt.UTC)
        elif isinstance(value, dt.date):
            at = dt.datetime.combine(value, dt.time(0, 0), tzinfo=dt.UTC)
        else:
            text = self.text(col, required=True)
            if not text:
                return None
            try:
                at = dt.datetime.fromisoformat(text)
            except ValueError:
                self.err(col, f"'{text}' is not a date and time (write YYYY-MM-DD HH:MM).")
                return None
            at = at if at.tzinfo else at.replace(tzinfo=dt.UTC)
        return self.plausible(col, at)

    def rate(self, col):
        """A failure rate per hour from a cell in per-hour or FIT (unit column or suffix)."""
        value = self.cells.get(col, "")
        if value == "" or value is None:
            return None
        text = str(value).strip()
        scale = 1.0
        match = re.fullmatch(r"(.*?)\s*(fit|/h|per hour)", text, flags=re.IGNORECASE)
        if match:
            text, suffix = match.group(1), match.group(2).lower()
            scale = FIT if suffix == "fit" else 1.0
        else:
            unit = self.text("rate_unit").lower()
            if unit in ("fit", "fits"):
                scale = FIT
            elif unit not in ("", "per hour", "/h", "1/h", "per_hour"):
                self.err("rate_unit", f"'{unit}' is not a rate unit; write 'per hour' or "
                                      "'FIT'.")
                return None
        try:
            number = float(text.replace(",", "."))
        except ValueError:
            self.err(col, f"'{value}' is not a failure rate.")
            return None
        per_hour = number * scale
        if not math.isfinite(per_hour):
            self.err(col, f"'{value}' is not a finite failure rate.")
            return None
        if per_hour < 0:
            self.err(col, "A failure rate cannot be negative.")
            return None
        limit = calculations().MAX_PLAUSIBLE_RATE_PER_HOUR  # the one plausibility rule
        if per_hour > limit:
            self.err(col, f"{value} per hour is not a plausible failure rate (at most "
                          f"{limit:g} per hour). If it is in FIT, write "
                          f"'{text} FIT' or put FIT in rate_unit.")
            return None
        return per_hour


def _differs(obj, values: dict) -> list[str]:
    out = []
    for name, new in values.items():
        old = getattr(obj, name)
        if isinstance(old, float) and isinstance(new, (int, float)):
            if new is None or abs(old - new) > 1e-12 * max(abs(old), abs(new)):
                out.append(f"{name}: {old:g} → {new:g}")
        elif old != new:
            out.append(f"{name}: {old if old not in (None, '') else '—'} → "
                       f"{new if new not in (None, '') else '—'}")
    return out


def _clean(instance, row: _Row, exclude=(), column_of=None):
    try:
        instance.full_clean(exclude=list(exclude), validate_unique=False)
    except ValidationError as exc:
        for key, msgs in exc.message_dict.items():
            col = (column_of or {}).get(key, "" if key == "__all__" else key)
            for m in msgs:
                row.err(col if col in COLUMNS else "", f"{key}: {m}" if col not in COLUMNS
                        else m)


SIF_COLS = {"name": "sif_name", "safe_state": "safe_state", "demand_mode": "demand_mode",
            "target_sil": "target_sil", "target_pfd_avg": "target_pfd_avg",
            "life_stage": "life_stage", "in_service_on": "in_service_on", "unit": "unit",
            "tag": "sif_tag", "target_pfh_per_hour": "target_pfd_avg"}
COMP_COLS = {"lambda_du_per_hour": "lambda_du", "lambda_dd_per_hour": "lambda_dd",
             "lambda_s_per_hour": "lambda_s", "proof_test_coverage": "proof_test_coverage",
             "partial_test_coverage": "partial_test_coverage", "in_service_on": "in_service_on",
             "tag": "component_tag", "device_type": "device_type", "voting": "voting",
             "beta": "beta", "beta_d": "beta_d", "role": "role", "name": "subsystem"}


def plan_import(site: Site, rows: list[tuple[int, dict]]) -> ImportPlan:
    """Check every row against the site's register; nothing is written."""
    plan = ImportPlan()
    errors = plan.errors
    units = {u.code: u for u in PlantUnit.objects.filter(site=site)}
    types = {t.name.lower(): t for t in DeviceType.objects.all()}
    existing = {(s.unit.code, s.tag): s for s in SafetyFunction.objects.filter(
        unit__site=site).select_related("unit")}
    subs = {(s.sif_id, s.name): s for s in Subsystem.objects.filter(sif__unit__site=site)}
    comps = {}
    comp_owner = {}
    for c in Component.objects.filter(subsystem__sif__unit__site=site).select_related(
            "subsystem"):
        comps[(c.subsystem.sif_id, c.tag)] = c
        comp_owner.setdefault(c.tag, c.subsystem.sif_id)
    full_plans = {}
    for p in TestPlan.objects.filter(sif__unit__site=site, kind=choices.TestKind.FULL
                                     ).order_by("name", "id"):
        full_plans.setdefault(p.sif_id, p)
    seen_sif, seen_comp = {}, {}
    file_sifs = set()
    tests = OrderedDict()

    kinds = ["sif", "component", "test"]
    for number, cells in rows:
        problems = cell_problems(number, cells)
        if problems:  # nothing else is read from a row holding such a cell
            errors.extend(problems)
            continue
        row = _Row(number, cells, errors, site)
        kind = row.choice("record", kinds)
        if kind is None:
            continue
        unit_code = row.text("unit", required=True)
        tag = row.text("sif_tag", required=True)
        unit = units.get(unit_code)
        if unit_code and unit is None:
            row.err("unit", f"Unknown unit '{unit_code}' at {site.name}; known: "
                            f"{', '.join(sorted(units)) or 'none'}.")
        key = (unit_code, tag)
        if kind == "sif":
            if key in seen_sif:
                row.err("sif_tag", f"Duplicate SIF tag {tag} in unit {unit_code} (first on "
                                   f"row {seen_sif[key]}).")
                continue
            seen_sif[key] = number
            file_sifs.add(key)
            values = {
                "name": row.text("sif_name", required=True),
                "safe_state": row.text("safe_state", required=True),
                "demand_mode": row.choice("demand_mode", choices.DemandMode.values,
                                          default=choices.DemandMode.LOW),
                "target_sil": row.number("target_sil", required=True, low=1, high=4,
                                         integer=True),
                "target_pfd_avg": row.number("target_pfd_avg", quantity="target_pfd"),
                "life_stage": row.choice("life_stage", choices.LifeStage.values,
                                         default=choices.LifeStage.IN_SERVICE),
                "in_service_on": row.date("in_service_on"),
            }
            interval = row.number("proof_test_interval_months", low=1, high=240, integer=True)
            if unit is None or not tag:
                continue
            sif = existing.get(key)
            if sif is None:
                probe = SafetyFunction(unit=unit, tag=tag, **values)
                _clean(probe, row, column_of=SIF_COLS)
                plan.steps.append(Step(number, "create", f"SIF {tag}",
                                       f"{values['name']}, SIL {values['target_sil']}"))
                plan.sif_ops.append((number, None, unit, tag, values, interval))
            else:
                diff = _differs(sif, values)
                fp = full_plans.get(sif.pk)
                if interval is not None and (fp is None or fp.interval_months != interval):
                    diff.append(f"proof-test interval: "
                                f"{fp.interval_months if fp else '—'} → {interval} months")
                if diff:
                    probe = SafetyFunction.objects.get(pk=sif.pk)
                    for k, v in values.items():
                        setattr(probe, k, v)
                    _clean(probe, row, column_of=SIF_COLS)
                plan.steps.append(Step(number, "change" if diff else "unchanged",
                                       f"SIF {tag}", "; ".join(diff)))
                plan.sif_ops.append((number, sif, unit, tag, values, interval))
            continue

        sif = existing.get(key)
        if unit is not None and tag and sif is None and key not in file_sifs:
            row.err("sif_tag", f"SIF {tag} is neither in unit {unit_code} nor on a 'sif' row "
                               "above.")
            continue
        comp_tag = row.text("component_tag", required=True)
        if kind == "component":
            ckey = (unit_code, tag, comp_tag)
            if ckey in seen_comp:
                row.err("component_tag", f"Duplicate component tag {comp_tag} in SIF {tag} "
                                         f"(first on row {seen_comp[ckey]}).")
                continue
            seen_comp[ckey] = number
            owner = comp_owner.get(comp_tag)
            if comp_tag and owner is not None and (sif is None or owner != sif.pk):
                other = next((s.tag for s in existing.values() if s.pk == owner), "?")
                row.err("component_tag", f"Tag {comp_tag} is already used by SIF {other}.")
            type_name = row.text("device_type", required=True)
            dtype = types.get(type_name.lower())
            if type_name and dtype is None:
                row.err("device_type", f"Unknown device type '{type_name}'; add it to the "
                                       "library first.")
            sub_values = {
                "role": row.choice("role", choices.SubsystemRole.values),
                "voting": row.text("voting", required=True),
                "beta": row.number("beta", quantity="fraction") or 0.0,
                "beta_d": row.number("beta_d", quantity="fraction") or 0.0,
            }
            comp_values = {
                "lambda_du_per_hour": row.rate("lambda_du"),
                "lambda_dd_per_hour": row.rate("lambda_dd"),
                "lambda_s_per_hour": row.rate("lambda_s"),
                "proof_test_coverage": row.number("proof_test_coverage", quantity="fraction"),
                "partial_test_coverage": row.number("partial_test_coverage",
                                                       quantity="fraction"),
                "in_service_on": row.date("in_service_on", required=True),
            }
            if comp_values["proof_test_coverage"] is None:
                comp_values["proof_test_coverage"] = 1.0
            if comp_values["partial_test_coverage"] is None:
                comp_values["partial_test_coverage"] = 0.0
            sub_name = row.text("subsystem", required=True)
            if dtype is None or unit is None or not comp_tag or not sub_name:
                continue
            sub = subs.get((sif.pk, sub_name)) if sif else None
            sub_diff = _differs(sub, sub_values) if sub else []
            probe_sub = Subsystem(name=sub_name, **sub_values)
            _clean(probe_sub, row, exclude=["sif"], column_of=COMP_COLS)
            comp = comps.get((sif.pk, comp_tag)) if sif else None
            if comp is None:
                probe = Component(tag=comp_tag, device_type=dtype, **comp_values)
                _clean(probe, row, exclude=["subsystem"], column_of=COMP_COLS)
                plan.steps.append(Step(number, "create", f"Component {comp_tag} of {tag}",
                                       f"{sub_name} ({sub_values['voting']}), {dtype.name}"
                                       + ("; subsystem " + "; ".join(sub_diff)
                                          if sub_diff else "")))
            else:
                diff = _differs(comp, {**comp_values, "device_type_id": dtype.pk})
                if comp.subsystem.name != sub_name:
                    diff.append(f"subsystem: {comp.subsystem.name} → {sub_name}")
                    row.err("subsystem", "Moving a component to another subsystem is not "
                                         "done by import.")
                diff += [f"subsystem {d}" for d in sub_diff]
                if diff:
                    probe = Component.objects.get(pk=comp.pk)
                    for k, v in comp_values.items():
                        setattr(probe, k, v)
                    _clean(probe, row, column_of=COMP_COLS)
                plan.steps.append(Step(number, "change" if diff else "unchanged",
                                       f"Component {comp_tag} of {tag}", "; ".join(diff)))
            plan.comp_ops.append((number, key, sub_name, sub_values, comp_tag, dtype,
                                  comp_values))
            continue

        # test rows: grouped into one record per (SIF, moment, kind)
        at = row.moment("test_performed_at")
        test_kind = row.choice("test_kind", choices.TestKind.values)
        verdicts = choices.Verdict.values
        result = {
            "as_found": row.choice("as_found", verdicts),
            "as_left": row.choice("as_left", verdicts),
            "failure_mode": row.choice("failure_mode", choices.FailureMode.values,
                                       required=False),
            "failure_description": row.text("failure_description"),
            "work_done": row.text("work_done"),
        }
        if at and at > timezone.now():
            row.err("test_performed_at", "The test date is in the future.")
        known = (sif and (sif.pk, comp_tag) in comps) or (unit_code, tag, comp_tag) in \
            seen_comp
        if comp_tag and not known:
            row.err("component_tag", f"Component {comp_tag} is not part of SIF {tag}.")
        for column, message in result_problems(**result).items():
            row.err(column, message)  # the result columns are named like the fields
        if not (at and test_kind and unit):
            continue
        tkey = (unit_code, tag, at, test_kind)
        group = tests.setdefault(tkey, {"row": number, "results": [], "remarks":
                                        row.text("remarks"), "tags": set()})
        if comp_tag in group["tags"]:
            row.err("component_tag", f"Component {comp_tag} appears twice in the test of "
                                     f"{at:%Y-%m-%d %H:%M} (first on row {group['row']}).")
        group["tags"].add(comp_tag)
        group["results"].append((number, comp_tag, result))

    existing_tests = set()
    if tests:
        for sif_id, at, kind in TestRecord.objects.filter(
                in_force(), sif__unit__site=site).values_list("sif_id", "performed_at",
                                                               "kind"):
            existing_tests.add((sif_id, at, kind))
    for (unit_code, tag, at, kind), group in tests.items():
        sif = existing.get((unit_code, tag))
        if sif and (sif.pk, at, kind) in existing_tests:
            plan.steps.append(Step(group["row"], "unchanged", f"Test of {tag}",
                                   f"{kind} on {at:%Y-%m-%d %H:%M} already recorded"))
            continue
        plan.steps.append(Step(group["row"], "create", f"Test of {tag}",
                               f"{kind} on {at:%Y-%m-%d %H:%M}, "
                               f"{len(group['results'])} component result(s)"))
        plan.test_ops.append((group["row"], (unit_code, tag), at, kind, group))
    plan.errors.sort(key=lambda e: (e.row, COLUMNS.index(e.column) if e.column in COLUMNS
                                    else -1))
    return plan


# ---------------------------------------------------------------------------------------
# Writing
# ---------------------------------------------------------------------------------------


class ImportFailed(Exception):
    def __init__(self, errors: list[CellError]):
        super().__init__(f"{len(errors)} error(s)")
        self.errors = errors


def _row_error(number: int, exc: ValidationError, column_of: dict) -> list[CellError]:
    out = []
    items = exc.message_dict.items() if hasattr(exc, "error_dict") else [("", exc.messages)]
    for key, msgs in items:
        col = column_of.get(key, "")
        out += [CellError(number, col, m) for m in msgs]
    return out


def _confirmed(site: Site, user, reference: str, password):
    """The checks before anything is written, in front of the small and the background
    path alike: the right to edit the register, the password (asked again: the test
    history is signed in the importer's name) and the change request reference."""
    require(user, Action.EDIT_REGISTER, site.pk)
    proof = services.confirm_password(user, password, outcome="nothing was imported")
    if not reference.strip():
        raise ImportFailed([CellError(1, "", "Give the change request reference of this "
                                             "import.")])
    return proof


#: The background import reports its progress after every this many rows written.
PROGRESS_CHUNK = 50


class _Progress:
    """Counts the file's rows as their operations are written and calls ``report(rows)``
    after every :data:`PROGRESS_CHUNK` of them."""

    def __init__(self, report):
        self.report, self.done, self.reported = report, 0, 0

    def add(self, rows: int):
        self.done += rows
        if self.report and self.done - self.reported >= PROGRESS_CHUNK:
            self.reported = self.done
            self.report(self.done)


def apply_import(site: Site, rows: list[tuple[int, dict]], user, reference: str,
                 password, progress=None) -> ImportPlan:
    """Check again, then write everything or nothing. Raises :class:`ImportFailed`, or a
    ValidationError keyed ``password`` when the importer's password (asked again: the
    test history is signed in their name) is missing or wrong. ``progress(rows)``, when
    given, is called every :data:`PROGRESS_CHUNK` rows written (the background job)."""
    proof = _confirmed(site, user, reference, password)
    reason = "spreadsheet import"
    affected: set[int] = set()
    written = _Progress(progress)
    with transaction.atomic(), followup.suspended():
        plan = plan_import(site, rows)
        if plan.errors:
            raise ImportFailed(plan.errors)
        sifs = {}
        for number, sif, unit, tag, values, interval in plan.sif_ops:
            written.add(1)
            try:
                if sif is None:
                    sif = SafetyFunction(unit=unit, tag=tag, **values)
                    sif = services.create_design(sif, user, reason=reason, reference=reference)
                elif _differs(sif, values):
                    sif = services.update_design(sif, user, reason=reason,
                                                 reference=reference, changes=values)
                if interval is not None:
                    fp = TestPlan.objects.filter(sif=sif, kind=choices.TestKind.FULL
                                                 ).order_by("name", "id").first()
                    if fp is None:
                        fp = TestPlan(sif=sif, name=FULL_PLAN_NAME,
                                      interval_months=interval)
                        fp = services.create_design(fp, user, reason=reason, reference=reference)
                    elif fp.interval_months != interval:
                        services.update_design(fp, user, reason=reason,
                                               reference=reference,
                                               changes={"interval_months": interval})
            except ValidationError as exc:
                raise ImportFailed(_row_error(number, exc, SIF_COLS)) from exc
            sifs[(unit.code, tag)] = sif
            affected.add(sif.pk)
        for number, key, sub_name, sub_values, comp_tag, dtype, comp_values in \
                plan.comp_ops:
            written.add(1)
            sif = sifs.get(key) or SafetyFunction.objects.get(unit__site=site,
                                                              unit__code=key[0],
                                                              tag=key[1])
            affected.add(sif.pk)
            try:
                sub = Subsystem.objects.filter(sif=sif, name=sub_name).first()
                if sub is None:
                    position = {"sensing": 1, "logic": 2, "final": 3}.get(
                        sub_values["role"], 0)
                    sub = Subsystem(sif=sif, name=sub_name, position=position,
                                    **sub_values)
                    sub = services.create_design(sub, user, reason=reason, reference=reference)
                elif _differs(sub, sub_values):
                    services.update_design(sub, user, reason=reason, reference=reference,
                                           changes=sub_values)
                comp = Component.objects.filter(subsystem__sif=sif, tag=comp_tag).first()
                values = {**comp_values, "device_type": dtype}
                if comp is None:
                    comp = Component(subsystem=sub, tag=comp_tag, **values)
                    comp = services.create_design(comp, user, reason=reason, reference=reference)
                elif _differs(comp, {**comp_values, "device_type_id": dtype.pk}):
                    services.update_design(comp, user, reason=reason, reference=reference,
                                           changes=values)
            except ValidationError as exc:
                raise ImportFailed(_row_error(number, exc, COMP_COLS)) from exc
        for number, key, at, kind, group in plan.test_ops:
            written.add(len(group["results"]))
            sif = sifs.get(key) or SafetyFunction.objects.get(unit__site=site,
                                                              unit__code=key[0],
                                                              tag=key[1])
            affected.add(sif.pk)
            by_tag = {c.tag: c for c in Component.objects.filter(subsystem__sif=sif)}
            results = [services.ResultInput(component=by_tag[t], **r)
                       for _, t, r in group["results"]]
            fp = None
            if kind in (choices.TestKind.FULL, choices.TestKind.PARTIAL):
                fp = TestPlan.objects.filter(sif=sif, kind=kind).order_by("name").first()
            try:
                record = services.save_draft(user=user, sif=sif, kind=kind,
                                             performed_at=at, results=results, plan=fp,
                                             remarks=group["remarks"])
                services.sign_record(record, user, proof, signed_at=at)
            except ValidationError as exc:
                raise ImportFailed(_row_error(number, exc, {
                    "performed_at": "test_performed_at", "kind": "test_kind"})) from exc
    if affected:
        from register.calculations import calculations
        from register.schedule.due import refresh_plans

        refresh_plans(TestPlan.objects.filter(sif_id__in=affected))
        calculations().recompute_many(SafetyFunction.objects.filter(pk__in=affected), trigger="import")
    return plan


def plan_counts(plan: ImportPlan) -> dict:
    """What a written import did: rows created, changed and left unchanged."""
    counts = {a: sum(1 for s in plan.steps if s.action == a)
              for a in ("create", "change", "unchanged")}
    return {**counts, "changes": plan.changes}


def summary_text(name: str, changes: int) -> str:
    """The one line that reports a written import, on either path."""
    return f"Imported {name}: {changes} row(s) created or changed."


# ---------------------------------------------------------------------------------------
# Long imports: a background job
# ---------------------------------------------------------------------------------------


def runs_in_background(rows: list) -> bool:
    """A file with more rows than IMPORT_BACKGROUND_ROWS is written by a background job."""
    return len(rows) > settings.IMPORT_BACKGROUND_ROWS


def queue_import(site: Site, name: str, data: bytes, user, reference: str,
                 password) -> ImportJob:
    """Confirm of a long import: the same checks as :func:`apply_import` (right, password,
    reference) in this request, then the checked file is kept in an :class:`ImportJob`
    and the job is queued once the request commits. A wrong password raises the same
    ValidationError and creates no job."""
    _confirmed(site, user, reference, password)
    rows = read_table(name, data)
    job = ImportJob.objects.create(site=site, user=user, reference=reference.strip(),
                                   file_name=name, file_data=data, rows_total=len(rows))

    def start():
        from register.lead.tasks import send_import_job

        send_import_job(job.pk)

    transaction.on_commit(start)
    return job


def _job_proof(job: ImportJob) -> services.Reauthenticated:
    """The proof :func:`apply_import` signs the job's tests with. A job exists only
    once :func:`queue_import` has checked its owner's password in the Confirm request,
    so the run carries that proof on; it holds for the job's owner alone."""
    return services.Reauthenticated(job.user_id)


@contextmanager
def _progress_writer(job_pk: int):
    """``report(rows)`` writing the rows done to the job on a connection of its own, so
    that the progress shows while the import's own transaction is still open (PostgreSQL;
    elsewhere the job shows its progress at the end only)."""
    if connection.vendor != "postgresql":
        yield None
        return
    side = connections.create_connection(DEFAULT_DB_ALIAS)
    sql = (f"UPDATE {side.ops.quote_name(ImportJob._meta.db_table)} "
           "SET rows_done = LEAST(%s, rows_total) WHERE id = %s")

    def report(rows: int):
        try:
            with side.cursor() as cur:
                cur.execute(sql, [rows, job_pk])
        except DatabaseError:  # progress is a courtesy: the import goes on
            log.warning("could not record the progress of import job %s", job_pk,
                        exc_info=True)

    try:
        yield report
    finally:
        side.close()


def _finish(job: ImportJob, **fields) -> ImportJob:
    fields["finished_at"] = timezone.now()
    ImportJob.objects.filter(pk=job.pk).update(**fields)
    job.refresh_from_db()
    return job


def run_import_job(job_id: int) -> ImportJob:
    """Write a queued job's file with :func:`apply_import`, all or nothing, keeping its
    progress and outcome on the row, under the job's lease (``register.job_lease``). A
    job finished, or being written by another worker, is left alone; one left "running"
    by a worker that is gone is written again (its writing was rolled back)."""
    return job_lease.run_claimed("import", ImportJob, job_id, _write_import_job,
                                 rows_done=0, message="Writing the rows")


def _write_import_job(job_id: int) -> ImportJob:
    job = ImportJob.objects.select_related("site", "user").get(pk=job_id)
    try:
        rows = read_table(job.file_name, bytes(job.file_data))
        with _progress_writer(job.pk) as report, transaction.atomic():
            # One transaction around the writing and the recompute after it, as a
            # request has: a failure anywhere leaves nothing written.
            plan = apply_import(job.site, rows, job.user, job.reference, _job_proof(job),
                                progress=report)
            # the outcome commits with the rows: nobody sees them while the job runs
            finished = _finish(job, status=ImportJob.Status.DONE, rows_done=job.rows_total,
                               result=plan_counts(plan), errors=[],
                               message=summary_text(job.file_name, plan.changes))
    except ImportFailed as exc:
        return _finish(job, status=ImportJob.Status.FAILED, rows_done=0,
                       errors=[str(e) for e in exc.errors],
                       message=f"{len(exc.errors)} error(s): nothing has been written.")
    except (FileError, ValidationError, PermissionDenied) as exc:
        text = " ".join(exc.messages) if isinstance(exc, ValidationError) else str(exc)
        return _finish(job, status=ImportJob.Status.FAILED, rows_done=0,
                       message=f"{text} Nothing has been written.")
    except Exception as exc:
        log.exception("import job %s failed", job.pk)
        return _finish(job, status=ImportJob.Status.FAILED, rows_done=0,
                       message=f"The import stopped: {exc}. Nothing has been written.")
    return finished
