"""The one bridge between the register's rows and the pure calculation engine.

``loading`` reads what N safety functions need in a fixed number of queries (the count
does not grow with N); ``inputs`` builds the engine's dataclasses from those rows;
``field_stats`` pools failure statistics per device type; ``assessment`` runs the engine
and stores each result with its verdict as an ``Assessment`` row. Nothing outside this
package imports ``calcs.engine`` on the Django side: the register reaches it through
``register.calculations.calculations()``, which returns this module, so the pure helpers
the register's pages and models need (SIL bands, unit constants, the rate plausibility
rule, voting parsing, the engine's error type) are handed on here too.
"""

from calcs.adapter.assessment import (
    assess,
    deferral_projection,
    latest_assessments,
    observed_demand_flag,
    pfd_series_for,
    recompute_many,
)
from calcs.adapter.field_stats import (
    TypeStats,
    compute_device_type_stats,
    device_type_stats,
    rate_table,
)
from calcs.adapter.inputs import (
    RateTable,
    assumed_demand_rate,
    design_input,
    evaluate_design,
    history_input,
    lopa_for_scenarios,
    period_figures,
    plan_intervals,
    planned_groups,
    scenario_input,
    target_pfd,
)
from calcs.adapter.loading import (
    SCHEDULE_TOLERANCE,
    SIGNIFICANCE,
    ComponentData,
    SifData,
    TestRow,
    load,
)
from calcs.engine.errors import EngineError, InputError
from calcs.engine.sil import sil_band, sil_from_pfd
from calcs.engine.units import (
    HOURS_PER_MONTH,
    HOURS_PER_YEAR,
    MAX_PLAUSIBLE_RATE_PER_HOUR,
    check_date_window,
    check_number,
    check_rate,
)
from calcs.engine.voting import parse_voting
from calcs.models import Assessment

__all__ = [
    "HOURS_PER_MONTH",
    "HOURS_PER_YEAR",
    "MAX_PLAUSIBLE_RATE_PER_HOUR",
    "SCHEDULE_TOLERANCE",
    "SIGNIFICANCE",
    "Assessment",
    "ComponentData",
    "EngineError",
    "InputError",
    "RateTable",
    "SifData",
    "TestRow",
    "TypeStats",
    "assess",
    "assumed_demand_rate",
    "check_date_window",
    "check_number",
    "check_rate",
    "compute_device_type_stats",
    "deferral_projection",
    "design_input",
    "device_type_stats",
    "evaluate_design",
    "history_input",
    "latest_assessments",
    "load",
    "lopa_for_scenarios",
    "observed_demand_flag",
    "parse_voting",
    "period_figures",
    "pfd_series_for",
    "plan_intervals",
    "planned_groups",
    "rate_table",
    "recompute_many",
    "scenario_input",
    "sil_band",
    "sil_from_pfd",
    "target_pfd",
]
