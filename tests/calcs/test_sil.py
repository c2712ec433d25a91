"""SIL bands, RRF, minimum HFT, Route 1H, SFF and DC (check-values section 3)."""

import math

import pytest

from calcs.engine import (
    InputError,
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

FIT = 1e-9


def test_s3_1a_sil_of_pfd():
    # IEC 61511-1:2016 Table 4, check-values S3.1a [V]
    assert sil_from_pfd(7.5e-3) == 2


def test_s3_1b_rrf():
    # RRF = 1/PFDavg definition, check-values S3.1b
    assert rrf(7.5e-3) == pytest.approx(133.33, rel=1e-3)


def test_s3_2_lower_bound_inclusive_sil1():
    # IEC 61508-1:2010 Table 2, lower bound inclusive, check-values S3.2 [V]
    assert sil_from_pfd(1.0e-2) == 1


def test_s3_3_lower_bound_inclusive_sil2():
    # IEC 61508-1:2010 Table 2, check-values S3.3 [V]
    assert sil_from_pfd(1.0e-3) == 2


def test_s3_4_no_sil():
    # IEC 61511-1:2016 Table 4 + "no SIL" convention, check-values S3.4 [V]
    assert sil_from_pfd(0.2) == 0


def test_s3_5_high_demand():
    # IEC 61511-1:2016 Table 5, check-values S3.5 [V]
    assert sil_from_pfh(5e-8) == 3


def test_s3_6_high_demand_boundary():
    # IEC 61511-1:2016 Table 5, lower bound inclusive, check-values S3.6 [V]
    assert sil_from_pfh(1e-6) == 1


def test_rounding_at_band_limit():
    # documented engine convention: a value within 1e-9 (relative) below a limit is the limit
    computed = 1e-5 / (0.1 * 0.1)  # 0.0009999999999999998 in binary floating point
    assert computed < 1e-3
    assert sil_from_pfd(computed) == 2
    assert sil_from_pfd(1e-3 * (1 - 1e-7)) == 3


def test_out_of_table_conventions():
    # check-values section 3 conventions: PFD >= 0.1 -> 0, PFD < 1e-5 -> SIL 4 cap
    assert sil_from_pfd(0.1) == 0
    assert sil_from_pfd(1.0) == 0
    assert sil_from_pfd(9.99e-6) == 4
    assert sil_from_pfd(0.0) == 4
    assert sil_from_pfh(1e-5) == 0
    assert sil_from_pfh(1e-10) == 4


@pytest.mark.parametrize(
    "sil, low, high",
    [(1, 1e-2, 1e-1), (2, 1e-3, 1e-2), (3, 1e-4, 1e-3), (4, 1e-5, 1e-4)],
)
def test_low_demand_band_limits(sil, low, high):
    # IEC 61508-1:2010 Table 2 / IEC 61511-1:2016 Table 4, check-values section 3 [V]
    assert sil_band(sil, "low") == (low, high)
    assert sil_from_pfd(low) == sil
    assert sil_from_pfd(high * (1 - 1e-6)) == sil
    assert sil_from_pfd(high) == sil - 1
    assert sil_for(low, "low") == sil


@pytest.mark.parametrize(
    "sil, low, high",
    [(1, 1e-6, 1e-5), (2, 1e-7, 1e-6), (3, 1e-8, 1e-7), (4, 1e-9, 1e-8)],
)
def test_high_demand_band_limits(sil, low, high):
    # IEC 61508-1:2010 Table 3 / IEC 61511-1:2016 Table 5, check-values section 3 [V]
    assert sil_band(sil, "high") == (low, high)
    assert sil_from_pfh(low) == sil
    assert sil_from_pfh(high * (1 - 1e-6)) == sil
    assert sil_from_pfh(high) == sil - 1
    assert sil_for(low, "continuous") == sil


@pytest.mark.parametrize(
    "case_id, sil, mode, expected",
    [
        ("S3.7a", 1, "low", 0),
        ("S3.7a", 1, "high", 0),
        ("S3.7b", 2, "low", 0),
        ("S3.7c", 2, "high", 1),
        ("S3.7d", 3, "low", 1),
        ("S3.7d", 3, "high", 1),
        ("S3.7e", 4, "low", 2),
        ("S3.7e", 4, "high", 2),
    ],
)
def test_s3_7_min_hft(case_id, sil, mode, expected):
    # IEC 61511-1:2016 Table 6, check-values S3.7a-e [V]
    assert min_hft(sil, mode) == expected, case_id


def test_max_sil_by_hft_61511_route():
    # derived from IEC 61511-1:2016 Table 6 (check-values S3.7): highest SIL with min HFT <= HFT
    assert [max_sil_by_hft(h, "low") for h in (0, 1, 2, 3)] == [2, 3, 4, 4]
    assert [max_sil_by_hft(h, "high") for h in (0, 1, 2, 3)] == [1, 3, 4, 4]


@pytest.mark.parametrize(
    "case_id, kind, sff_value, hft, expected",
    [
        ("S3.8a", "A", 0.65, 0, 2),  # IEC 61508-2:2010 Table 2 [V]
        ("S3.8b", "B", 0.65, 0, 1),  # IEC 61508-2:2010 Table 3 [V]
        ("S3.8c", "B", 0.55, 0, 0),  # Table 3: not allowed [V]
        ("S3.8d", "B", 0.92, 1, 3),  # Table 3 [V]
    ],
)
def test_s3_8_route_1h(case_id, kind, sff_value, hft, expected):
    # IEC 61508-2:2010 Tables 2 and 3, check-values S3.8a-d
    assert route_1h_max_sil(sff_value, kind, hft) == expected, case_id


def test_route_1h_full_tables():
    # IEC 61508-2:2010 Table 2 (type A) and Table 3 (type B) as listed in check-values section 3 [V]
    rows = {0.3: ((1, 2, 3), (0, 1, 2)), 0.6: ((2, 3, 4), (1, 2, 3)),
            0.9: ((3, 4, 4), (2, 3, 4)), 0.99: ((3, 4, 4), (3, 4, 4))}
    for sff_value, (type_a, type_b) in rows.items():
        assert tuple(route_1h_max_sil(sff_value, "A", h) for h in (0, 1, 2)) == type_a
        assert tuple(route_1h_max_sil(sff_value, "B", h) for h in (0, 1, 2)) == type_b
    # an SFF just below a row limit stays in the lower row
    assert route_1h_max_sil(math.nextafter(0.9, 0), "B", 0) == 1
    # HFT above 2 is read in the HFT 2 column (documented conservative reading)
    assert route_1h_max_sil(0.5, "B", 3) == 2


def test_s3_9a_sff():
    # SFF definition IEC 61508-2:2010, check-values S3.9a [R]
    assert sff(500 * FIT, 400 * FIT, 100 * FIT) == pytest.approx(0.90, rel=1e-3)


def test_s3_9b_dc():
    # DC definition, check-values S3.9b
    assert dc(400 * FIT, 100 * FIT) == pytest.approx(0.80, rel=1e-3)


def test_architectural_limit_routes():
    # IEC 61511-1:2016 Table 6 vs IEC 61508-2 Table 3 (check-values S3.7, S3.8b)
    only_hft = architectural_limit(0, "low")
    assert (only_hft.route, only_hft.sil, only_hft.by_route_1h) == ("61511", 2, None)
    # Either route satisfies the standard (IEC 61511-1:2016 11.4 admits the IEC 61508-2
    # routes as an alternative to Table 6; clause wording from memory): the higher counts.
    both = architectural_limit(0, "low", 0.65, "B")
    assert (both.route, both.sil, both.by_61511, both.by_route_1h) == ("61511", 2, 2, 1)
    better_1h = architectural_limit(0, "low", 0.95, "A")  # type A, SFF 90-99 %, HFT 0: SIL 3
    assert (better_1h.route, better_1h.sil) == ("1H", 3)
    forced = architectural_limit(0, "low", 0.65, "B", route="61511")
    assert forced.sil == 2
    with pytest.raises(InputError):
        architectural_limit(0, "low", route="1H")


def test_sif_limit_min_over_subsystems():
    # common practice, no source: SIF limit = min over subsystems and systematic capability
    limit = sif_limit(3, {"sensors": 3, "valves": 2}, {"sensors": None, "valves": 3})
    assert (limit.sil, limit.architectural_sil, limit.limited_by) == (2, 2, "architecture:valves")
    limit = sif_limit(3, {"sensors": 3}, {"sensors": 1})
    assert (limit.sil, limit.limited_by) == (1, "systematic_capability:sensors")
    limit = sif_limit(1, {"sensors": 3}, {"sensors": 2})
    assert (limit.sil, limit.limited_by) == (1, "pfd_avg")


def test_bad_inputs():
    with pytest.raises(InputError):
        sil_from_pfd(-1e-3)
    with pytest.raises(InputError):
        sil_band(5)
    with pytest.raises(InputError):
        route_1h_max_sil(1.2, "A", 0)
    with pytest.raises(InputError):
        route_1h_max_sil(0.5, "C", 0)
    with pytest.raises(InputError):
        min_hft(2, "sometimes")
    with pytest.raises(InputError):
        sff(0, 0, 0)
    assert rrf(0.0) == math.inf
