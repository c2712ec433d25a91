"""LOPA arithmetic (check-values section 5)."""

import pytest

from calcs.engine import (
    ConditionalModifier,
    InitiatingCause,
    InputError,
    ProtectionLayer,
    Scenario,
    evaluate_scenario,
    evaluate_scenarios,
    frequency_from_mtbf_years,
    frequency_per_year_from_rate_per_hour,
    mitigated_frequency,
)


def _scenario(name="overpressure", tolerable=1e-5, causes=(1 / 75,), layers=(0.1,), modifiers=()):
    return Scenario(
        name=name,
        tolerable_frequency_per_year=tolerable,
        causes=tuple(InitiatingCause(f"cause {i}", f) for i, f in enumerate(causes)),
        layers=tuple(ProtectionLayer(f"layer {i}", p) for i, p in enumerate(layers)),
        modifiers=tuple(ConditionalModifier(f"modifier {i}", p) for i, p in enumerate(modifiers)),
    )


def test_s5_1_frequency_from_mtbf():
    # common practice, no source; check-values S5.1 [CP]
    assert frequency_from_mtbf_years(75) == pytest.approx(1.3333e-2, rel=1e-3)


def test_s5_2_required_pfd_rrf_sil():
    # LOPA arithmetic, check-values S5.2a (required PFD) [CP], S5.2b (SIL band, [V]), S5.2c (RRF) [CP]
    result = evaluate_scenario(_scenario(causes=(frequency_from_mtbf_years(75),)))
    assert result.required_pfd_avg == pytest.approx(7.5e-3, rel=1e-3)  # S5.2a
    assert result.required_sil == 2  # S5.2b
    assert result.required_rrf == pytest.approx(133.33, rel=1e-3)  # S5.2c
    assert result.outcome == "sil"
    assert result.frequency_without_sif_per_year == pytest.approx(1.3333e-3, rel=1e-3)


def test_s5_3_mitigated_frequency():
    # product of IE frequency and layer PFDs, check-values S5.3 [CP]
    assert mitigated_frequency(0.1, [0.1, 0.01, 0.01]) == pytest.approx(1.0e-6, rel=1e-3)


def test_s5_4_rate_per_hour_to_per_year():
    # CCPS 2015 via hazop360, check-values S5.4 [V sec.]
    assert frequency_per_year_from_rate_per_hour(1e-5) == pytest.approx(0.0876, rel=1e-3)


def test_causes_add_and_modifiers_multiply():
    # LOPA arithmetic as in check-values section 5 [CP]: f = sum(IE) x prod(PFD) x prod(modifiers)
    result = evaluate_scenario(
        _scenario(tolerable=1e-4, causes=(0.1, 0.2), layers=(0.1, 0.01), modifiers=(0.5,)))
    assert result.initiating_frequency_per_year == pytest.approx(0.3)
    assert result.frequency_without_sif_per_year == pytest.approx(0.3 * 1e-3 * 0.5)
    assert result.required_pfd_avg == pytest.approx(1e-4 / 1.5e-4)
    assert result.outcome == "below_sil1"
    assert result.required_sil == 0


def test_outcomes():
    # classification convention of this engine (common practice, no source)
    assert evaluate_scenario(_scenario(tolerable=1e-3, causes=(0.1,), layers=(0.01,))).outcome \
        == "no_sif_needed"  # required PFD 1.0
    beyond = evaluate_scenario(_scenario(tolerable=1e-7, causes=(1.0,), layers=(0.1,)))
    assert beyond.required_pfd_avg == pytest.approx(1e-6)
    assert (beyond.outcome, beyond.required_sil) == ("beyond_sil4", None)
    sil4 = evaluate_scenario(_scenario(tolerable=1e-6, causes=(1.0,), layers=(0.1,)))
    assert (sil4.outcome, sil4.required_sil) == ("sil", 4)
    edge = evaluate_scenario(_scenario(tolerable=1e-3, causes=(0.1,), layers=()))
    assert edge.required_pfd_avg == pytest.approx(1e-2)
    assert edge.required_sil == 1  # IEC 61511-1:2016 Table 4: lower bound inclusive [V]


def test_steps_show_the_arithmetic():
    result = evaluate_scenario(_scenario(causes=(0.1, 0.05), layers=(0.1,), modifiers=(0.5,)))
    labels = [label for label, _ in result.steps]
    values = dict(result.steps)
    assert len(labels) == 11
    assert values["sum of initiating frequencies (per year)"] == pytest.approx(0.15)
    assert values["required SIF PFDavg = tolerable / frequency without the SIF"] == \
        pytest.approx(result.required_pfd_avg)
    assert labels[-1].startswith("required RRF")


def test_strictest_scenario_governs():
    scenarios = [
        _scenario("fire", tolerable=1e-4, causes=(0.1,), layers=(0.1,)),  # 1e-2
        _scenario("toxic release", tolerable=1e-5, causes=(0.1,), layers=(0.1,)),  # 1e-3
        _scenario("overfill", tolerable=1e-3, causes=(0.1,)),  # 1e-2
    ]
    result = evaluate_scenarios(scenarios)
    assert result.governing == 1
    assert result.governing_scenario.name == "toxic release"
    assert result.required_pfd_avg == pytest.approx(1e-3)
    assert result.required_sil == 2


@pytest.mark.parametrize(
    "build",
    [
        lambda: InitiatingCause("pump", -0.1),
        lambda: InitiatingCause("pump", "0.1"),
        lambda: ProtectionLayer("relief valve", 1.5),
        lambda: ProtectionLayer("relief valve", 0.0),
        lambda: ConditionalModifier("occupancy", 2),
        lambda: Scenario("empty", 1e-4, causes=()),
        lambda: Scenario("bad", 0, causes=(InitiatingCause("pump", 0.1),)),
        lambda: evaluate_scenarios([]),
    ],
)
def test_bad_input(build):
    with pytest.raises(InputError):
        build()
