"""Evidence packs: everything an auditor asks for about one SIF, a unit or a site over a
period, in one zip.

The zip holds ``report.pdf`` (readable on paper, fonts embedded), the same facts as CSV
tables and as ``pack.json``, one PNG chart per SIF under ``charts/``, and
``manifest.json`` listing every other file with its SHA-256 and size.

Data are loaded in bulk for the whole scope (a fixed number of queries, plus a few per
month-end for the overdue history); the per-SIF cost is the chart and the PDF pages.
"""

from register.audit.evidence import build as _build_module
from register.audit.evidence.build import (
    build,
    run,
)
from register.audit.evidence.collect import (
    ACHIEVED_FORMULA,
    CHART_POINTS,
    CSV_FILES,
    DESIGN_FORMULA,
    OBSERVED_METHOD,
    OVERDUE_STATES,
    Collected,
    collect,
    packs_dir,
    scope_queryset,
)
from register.audit.evidence.figures import (
    figures,
)
from register.audit.evidence.pdf import (
    FONT_DIR,
    render_pdf,
)
from register.audit.evidence.requests import (
    MAX_PACK_YEARS,
    pack_file,
    pack_request_errors,
    request_pack,
)
from register.audit.evidence.tables import (
    cover_facts,
    csv_files,
)
from register.presenters import CAUTION

#: The steps of a build (``begin``, ``section``, ``assemble``, ...) for the pack tasks; the
#: module's name is taken by ``build`` the function.
build_steps = _build_module

__all__ = [
    "ACHIEVED_FORMULA",
    "CAUTION",
    "CHART_POINTS",
    "CSV_FILES",
    "DESIGN_FORMULA",
    "FONT_DIR",
    "MAX_PACK_YEARS",
    "OBSERVED_METHOD",
    "OVERDUE_STATES",
    "Collected",
    "build",
    "build_steps",
    "collect",
    "cover_facts",
    "csv_files",
    "figures",
    "pack_file",
    "pack_request_errors",
    "packs_dir",
    "render_pdf",
    "request_pack",
    "run",
    "scope_queryset",
]
