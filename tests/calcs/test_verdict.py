"""The verdict: each criterion alone turns 'meets target' (calcs.engine.verdict)."""

import pytest

from calcs.engine.verdict import CRITERIA, judge

GOOD = dict(target_sil=2, target_pfd_avg=5e-3, design_pfd_avg=3e-3, achieved_pfd_avg_12m=4e-3,
            observed_unavailability_12m=0.0, projected_pfd_avg=4.5e-3, architectural_sil=2,
            systematic_capability=2)


def test_all_criteria_pass():
    v = judge(**GOOD)
    assert v.meets is True
    assert [x.key for x in v.lines] == list(CRITERIA)
    assert all(x.status == "pass" for x in v.lines)


@pytest.mark.parametrize("key,change", [
    ("design", {"design_pfd_avg": 6e-3}),
    ("achieved_12m", {"achieved_pfd_avg_12m": 6e-3}),
    ("observed_12m", {"observed_unavailability_12m": 0.5}),
    ("projected", {"projected_pfd_avg": 5.1e-3}),
    ("architecture", {"architectural_sil": 1}),
    ("systematic", {"systematic_capability": 1}),
])
def test_each_criterion_alone_turns_the_verdict(key, change):
    v = judge(**{**GOOD, **change})
    assert v.meets is False
    assert [x.key for x in v.failed] == [key]
    assert v.failed[0].reason in v.summary()


def test_not_calculable_is_not_meeting_and_says_why():
    v = judge(**{**GOOD, "systematic_capability": None, "projected_pfd_avg": None,
                 "projection_missing": "no full proof test is planned"})
    assert v.meets is None
    assert {x.key for x in v.unknown} == {"systematic", "projected"}
    assert "no full proof test is planned" in v.summary()
    # a failing line decides even when another is not calculable
    assert judge(**{**GOOD, "systematic_capability": None, "design_pfd_avg": 1e-2}).meets is False


def test_boundary_equal_to_target_passes_and_high_demand_uses_pfh():
    assert judge(**{**GOOD, "achieved_pfd_avg_12m": 5e-3}).meets is True
    v = judge(target_sil=2, low_demand=False, target_pfh_per_hour=1e-6,
              design_pfh_per_hour=2e-6, architectural_sil=2, systematic_capability=2)
    assert v.meets is False and v.failed[0].key == "design"


def test_calculation_error_leaves_every_line_unknown():
    v = judge(target_sil=2, error="no full proof-test plan covers subsystem 'S'")
    assert v.meets is None and len(v.unknown) == len(CRITERIA)
