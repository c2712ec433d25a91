"""Design calculation engine of SIF Ledger (pure Python, no web framework).

Public API, re-exported here:

* SIL bands and architecture: :mod:`calcs.engine.sil`
* LOPA targets: :mod:`calcs.engine.lopa`
* PFDavg / PFH design calculation: :mod:`calcs.engine.design`
* JSON case evaluation: :func:`evaluate_case`
"""

from .case import build_design, evaluate_case
from .design import (
    HOURS_PER_YEAR,
    METHOD_IEC,
    METHOD_ISA,
    METHODS,
    PROOF_TEST_INTERVAL_CAP_HOURS,
    SifDesign,
    SifResult,
    Subsystem,
    SubsystemResult,
    TestMoveResult,
    evaluate_sif,
    evaluate_subsystem,
    group_pfd,
    group_pfh,
    max_proof_test_interval,
    pfd_1oo1,
    pfd_1oo2,
    pfd_1oo2d,
    pfd_2oo2,
    pfd_2oo3,
    pfd_if_test_moved,
    pfd_isa,
    pfd_moon,
    pfh_1oo1,
    pfh_1oo2,
    pfh_1oo2d,
    pfh_2oo2,
    pfh_2oo3,
    pfh_moon,
    proof_test_interval_cap,
    sif_pfd_avg,
    sif_pfh,
    subsystem_pfd_avg,
    subsystem_pfh,
    t_ce,
    t_ge,
)
from .errors import EngineError, InputError
from .lopa import (
    ConditionalModifier,
    InitiatingCause,
    LopaResult,
    ProtectionLayer,
    Scenario,
    ScenarioResult,
    evaluate_scenario,
    evaluate_scenarios,
    frequency_from_mtbf_years,
    frequency_per_year_from_rate_per_hour,
    mitigated_frequency,
)
from .sil import (
    ArchitectureLimit,
    SifLimit,
    architectural_limit,
    dc,
    max_sil_by_hft,
    min_hft,
    route_1h_max_sil,
    rrf,
    sff,
    sif_limit,
    sil_band,
    sil_for,
    sil_from_pfd,
    sil_from_pfh,
)
from .voting import Voting, parse_voting

__all__ = [name for name in dir() if not name.startswith("_")]
