"""The one door from the register to the calculations.

``calcs`` depends on the register (its adapter reads the register's models and stores
``Assessment`` rows that point at them), so the register never imports ``calcs``: that
would make the two apps a cycle. What the register needs from the calculations (running
them, the rows they store, the SIL bands, unit constants and error type the engine
defines) it asks for here. ``calculations()`` imports the module named by the
``SIF_LEDGER_CALCULATIONS`` setting (default ``calcs.adapter``) the first time it is called,
at run time, never while the register's modules are being imported.
"""

from __future__ import annotations

import functools
import importlib
from types import ModuleType

from django.conf import settings

DEFAULT = "calcs.adapter"


@functools.cache
def calculations() -> ModuleType:
    """The calculations' adapter: ``calcs.adapter`` unless the setting names another."""
    return importlib.import_module(getattr(settings, "SIF_LEDGER_CALCULATIONS", DEFAULT))
