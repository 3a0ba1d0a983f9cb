"""colonies.chemistry against published values; the source of every expected value is named beside it.

Tags as in /work/shared/REFERENCES.md: [V] printed in the source (or a faithful reproduction),
[C] computed from the source's equation.
"""
import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from colonies import chemistry
from colonies.chemistry import (
    nitrogen_to_ammonia_mg_l,
    oxygen_percent_saturation,
    oxygen_solubility_mg_l,
    practical_salinity,
    specific_conductance_25,
    total_hardness_caco3,
    unionized_ammonia_fraction,
    unionized_ammonia_mg_l,
)

# --- Un-ionized ammonia --------------------------------------------------------------------------


def test_unionized_fraction_at_20c_ph7_matches_emerson_equation():
    # Emerson et al. 1975, J. Fish. Res. Board Can. 32:2379, pKa equation: 0.3942 % [C]
    assert unionized_ammonia_fraction(7.0, 20.0) == pytest.approx(0.003942, abs=5e-7)


def test_unionized_fraction_at_25c_ph8_matches_emerson_equation():
    # Emerson et al. 1975, pKa equation: 5.366 % [C]. The misprinted constant 2727.92 or
    # T = °C + 273 would give a value about 1-2 % higher and fail this tolerance.
    assert unionized_ammonia_fraction(8.0, 25.0) == pytest.approx(0.05366, abs=5e-6)


def test_unionized_ammonia_is_total_times_fraction_as_nitrogen():
    # Emerson et al. 1975 equation, 25 °C pH 8: 5.366 % of 2.0 mg/L N [C]
    assert unionized_ammonia_mg_l(2.0, 8.0, 25.0) == pytest.approx(2.0 * 0.05366, abs=1e-5)
    assert unionized_ammonia_mg_l(0.0, 8.0, 25.0) == 0.0


def test_nitrogen_to_ammonia_uses_molar_masses():
    # Molar masses N 14.007, NH3 17.031 g/mol: 1 mg N is 1.2159 mg NH3
    assert nitrogen_to_ammonia_mg_l(14.007) == pytest.approx(17.031)
    assert nitrogen_to_ammonia_mg_l(1.0) == pytest.approx(1.21589, abs=1e-5)


@given(
    ph=st.floats(min_value=0.0, max_value=13.9),
    delta=st.floats(min_value=0.01, max_value=14.0),
    temp_c=st.floats(min_value=0.0, max_value=50.0),
)
def test_unionized_fraction_rises_with_ph(ph, delta, temp_c):
    higher = min(ph + delta, 14.0)
    low, high = unionized_ammonia_fraction(ph, temp_c), unionized_ammonia_fraction(higher, temp_c)
    assert 0.0 < low < 1.0
    # Near pH 14 the fraction rounds to 1.0 in floating point, so strictly only where it can move.
    assert high > low if high < 0.999 else high >= low


@given(
    temp_c=st.floats(min_value=0.0, max_value=49.9),
    delta=st.floats(min_value=0.1, max_value=50.0),
    ph=st.floats(min_value=2.0, max_value=12.0),
)
def test_unionized_fraction_rises_with_temperature(temp_c, delta, ph):
    warmer = min(temp_c + delta, 50.0)
    assert unionized_ammonia_fraction(ph, warmer) > unionized_ammonia_fraction(ph, temp_c)


@pytest.mark.parametrize(
    ("ph", "temp_c", "match"),
    [
        (7.0, -0.1, r"temp_c=-0\.1 is outside 0 to 50 °C"),
        (7.0, 50.1, r"temp_c=50\.1 is outside 0 to 50 °C"),
        (-0.5, 20.0, r"ph=-0\.5 is outside 0 to 14"),
        (14.5, 20.0, r"ph=14\.5 is outside 0 to 14"),
        (math.nan, 20.0, r"ph=nan"),
    ],
)
def test_unionized_fraction_rejects_values_outside_validity(ph, temp_c, match):
    with pytest.raises(ValueError, match=match):
        unionized_ammonia_fraction(ph, temp_c)


def test_unionized_ammonia_rejects_negative_total_ammonia():
    with pytest.raises(ValueError, match=r"total_ammonia_n_mg_l=-1\.0"):
        unionized_ammonia_mg_l(-1.0, 7.0, 20.0)


# --- Oxygen solubility ---------------------------------------------------------------------------


def test_oxygen_solubility_at_0c_matches_usgs_table():
    # Benson & Krause 1984 as tabulated in USGS OWQ Tech. Memo 99.01 / Standard Methods 4500-O:
    # 0 °C, fresh water, 1 atm -> 14.621 mg/L [V]
    assert oxygen_solubility_mg_l(0.0) == pytest.approx(14.621, abs=5e-4)


def test_oxygen_solubility_at_20c_matches_usgs_table():
    # Benson & Krause 1984, USGS OWQ Tech. Memo 99.01 / Standard Methods 4500-O: 20 °C -> 9.092 mg/L [V]
    assert oxygen_solubility_mg_l(20.0) == pytest.approx(9.092, abs=5e-4)


def _garcia_gordon_ml_l(temp_c: float, salinity: float) -> float:
    # Garcia & Gordon 1992, Limnol. Oceanogr. 37:1307-1312, eq. 8 with the Table 1 coefficients for
    # their refit of the Benson & Krause data in cm3/dm3 (mL/L). Coefficients as reproduced
    # identically in several independent oceanographic codes (e.g. the Sea-Bird SBE 43 manual).
    ts = math.log((298.15 - temp_c) / (273.15 + temp_c))
    a = (2.00907, 3.22014, 4.05010, 4.94457, -0.256847, 3.88767)
    b = (-6.24523e-3, -7.37614e-3, -1.03410e-2, -8.17083e-3)
    c0 = -4.88682e-7
    return math.exp(
        sum(ai * ts**i for i, ai in enumerate(a)) + salinity * sum(bi * ts**i for i, bi in enumerate(b))
        + c0 * salinity**2
    )


def test_garcia_gordon_reimplementation_reproduces_its_check_value():
    # Garcia & Gordon 1992 check value: 6.315 mL/L at 10 °C, S = 35 (from memory, as quoted in
    # reproductions; not in REFERENCES.md). It only confirms our transcription of their coefficients;
    # the comparison with Benson & Krause below is the check that matters.
    assert _garcia_gordon_ml_l(10.0, 35.0) == pytest.approx(6.315, abs=5e-4)


@pytest.mark.parametrize("temp_c", [0.0, 5.0, 10.0, 15.0, 20.0, 25.0, 30.0, 35.0, 40.0])
@pytest.mark.parametrize("salinity", [0.0, 10.0, 20.0, 35.0, 40.0])
def test_oxygen_solubility_agrees_with_garcia_gordon_1992(temp_c, salinity):
    # Both are fits to the Benson & Krause 1984 data, so they agree closely (within 0.05 % here).
    # 1 mL O2 = 44.6596 µmol (Garcia & Gordon 1992) × 31.9988 g/mol O2.
    expected_mg_l = _garcia_gordon_ml_l(temp_c, salinity) * 44.6596 * 31.9988 / 1000
    assert oxygen_solubility_mg_l(temp_c, salinity) == pytest.approx(expected_mg_l, rel=1e-3)


def test_seawater_holds_less_oxygen_than_fresh_water():
    # Benson & Krause 1984 salinity term; at 20 °C S = 35 about 19 % less (Garcia & Gordon 1992 agree,
    # see the cross-check above).
    fresh, sea = oxygen_solubility_mg_l(20.0), oxygen_solubility_mg_l(20.0, salinity=35.0)
    assert 0.78 < sea / fresh < 0.84


def test_pressure_correction_is_one_at_standard_pressure_and_about_half_at_half_pressure():
    # Standard Methods 4500-O / USGS Tech. Memo 99.01 pressure correction: at P = 1 atm it is exactly 1;
    # at half an atmosphere a little under half, because water vapour keeps its partial pressure.
    at_sea_level = oxygen_solubility_mg_l(20.0)
    assert oxygen_solubility_mg_l(20.0, pressure_kpa=101.325) == at_sea_level
    ratio = oxygen_solubility_mg_l(20.0, pressure_kpa=101.325 / 2) / at_sea_level
    assert 0.48 < ratio < 0.50


@given(
    temp_c=st.floats(min_value=0.0, max_value=39.9),
    delta=st.floats(min_value=0.01, max_value=40.0),
    salinity=st.floats(min_value=0.0, max_value=40.0),
)
def test_oxygen_solubility_falls_with_temperature(temp_c, delta, salinity):
    warmer = min(temp_c + delta, 40.0)
    assert oxygen_solubility_mg_l(warmer, salinity) < oxygen_solubility_mg_l(temp_c, salinity)


@given(
    salinity=st.floats(min_value=0.0, max_value=39.9),
    delta=st.floats(min_value=0.01, max_value=40.0),
    temp_c=st.floats(min_value=0.0, max_value=40.0),
)
def test_oxygen_solubility_falls_with_salinity(salinity, delta, temp_c):
    saltier = min(salinity + delta, 40.0)
    assert oxygen_solubility_mg_l(temp_c, saltier) < oxygen_solubility_mg_l(temp_c, salinity)


@given(
    pressure_kpa=st.floats(min_value=50.0, max_value=109.0),
    delta=st.floats(min_value=0.1, max_value=60.0),
    temp_c=st.floats(min_value=0.0, max_value=40.0),
)
def test_oxygen_solubility_rises_with_pressure(pressure_kpa, delta, temp_c):
    higher = min(pressure_kpa + delta, 110.0)
    assert oxygen_solubility_mg_l(temp_c, 0.0, higher) > oxygen_solubility_mg_l(temp_c, 0.0, pressure_kpa)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"temp_c": -0.1}, r"temp_c=-0\.1 is outside 0 to 40 °C"),
        ({"temp_c": 40.5}, r"temp_c=40\.5 is outside 0 to 40 °C"),
        ({"temp_c": 20.0, "salinity": -1.0}, r"salinity=-1\.0 is outside 0 to 40"),
        ({"temp_c": 20.0, "salinity": 45.0}, r"salinity=45\.0 is outside 0 to 40"),
        ({"temp_c": 20.0, "pressure_kpa": 49.0}, r"pressure_kpa=49\.0 is outside 50 to 110 kPa"),
        ({"temp_c": 20.0, "pressure_kpa": 1013.0}, r"pressure_kpa=1013\.0 is outside 50 to 110 kPa"),
        ({"temp_c": math.inf}, r"temp_c=inf"),
    ],
)
def test_oxygen_solubility_rejects_values_outside_validity(kwargs, match):
    with pytest.raises(ValueError, match=match):
        oxygen_solubility_mg_l(**kwargs)


@given(temp_c=st.one_of(st.floats(max_value=-1e-6), st.floats(min_value=40.000001)))
def test_oxygen_solubility_rejects_any_temperature_outside_0_to_40(temp_c):
    with pytest.raises(ValueError):
        oxygen_solubility_mg_l(temp_c)


def test_percent_saturation_is_100_at_solubility_and_0_without_oxygen():
    assert oxygen_percent_saturation(oxygen_solubility_mg_l(20.0), 20.0) == pytest.approx(100.0)
    assert oxygen_percent_saturation(9.092 / 2, 20.0) == pytest.approx(50.0, abs=0.01)  # USGS 20 °C value [V]
    assert oxygen_percent_saturation(0.0, 20.0) == 0.0
    # Supersaturation is real (algal blooms, pure-oxygen supply), so above 100 % is allowed.
    assert oxygen_percent_saturation(15.0, 20.0) > 100.0


def test_percent_saturation_rejects_negative_oxygen():
    with pytest.raises(ValueError, match=r"do_mg_l=-0\.5"):
        oxygen_percent_saturation(-0.5, 20.0)


# --- Conductivity --------------------------------------------------------------------------------


def test_specific_conductance_compensates_to_25c():
    # Standard Methods 2510 linear compensation, α = 0.0191: 1278 µS/cm at 20 °C -> 1412.9 [C],
    # i.e. 0.01 M KCl, 1413 µS/cm at 25 °C (US EPA Method 120.1) [V].
    assert specific_conductance_25(1278.0, 20.0) == pytest.approx(1412.9, abs=0.05)


def test_specific_conductance_is_unchanged_at_25c_or_without_a_coefficient():
    assert specific_conductance_25(1413.0, 25.0) == 1413.0
    assert specific_conductance_25(1278.0, 20.0, alpha=0.0) == 1278.0


@pytest.mark.parametrize(
    ("args", "match"),
    [
        ((-1.0, 20.0), r"conductivity_us_cm=-1\.0"),
        ((1000.0, 41.0), r"temp_c=41\.0 is outside 0 to 40 °C"),
        ((1000.0, 20.0, 0.05), r"alpha=0\.05 is outside 0 to 0\.03"),
    ],
)
def test_specific_conductance_rejects_impossible_inputs(args, match):
    with pytest.raises(ValueError, match=match):
        specific_conductance_25(*args)


# --- Practical salinity (PSS-78) ------------------------------------------------------------------


def test_salinity_is_35_for_standard_seawater_conductivity_at_15c():
    # UNESCO 1983 Tech. Pap. Mar. Sci. 44 (PSS-78 definition): C(35, 15 °C, 0 dbar) = 42.914 mS/cm,
    # ratio 1 -> S = 35 [V]. The paper's 15 °C is IPTS-68; our input is ITS-90 (t68 = 1.00024 t90).
    assert practical_salinity(42.914, 15.0 / 1.00024) == pytest.approx(35.0, abs=1e-4)


def test_pss78_core_reproduces_unesco_check_values():
    # UNESCO 1983 Tech. Pap. Mar. Sci. 44 check values [V]: R = 1 at 15 °C, 0 dbar -> 35;
    # R = 1.888091 at 40 °C (IPTS-68), 10000 dbar -> 40.0000. 40 °C lies outside the -2..35 °C range
    # the public function enforces, so this goes through the unguarded core.
    assert chemistry._pss78_salinity(1.0, 15.0, 0.0) == pytest.approx(35.0, abs=1e-4)
    assert chemistry._pss78_salinity(1.888091, 40.0, 10000.0) == pytest.approx(40.0, abs=1e-4)


def test_salinity_rejects_fresh_water_below_pss78_range():
    # UNESCO 1983: PSS-78 is defined for 2 <= S <= 42; 1 mS/cm at 20 °C is about S 0.5.
    with pytest.raises(ValueError, match=r"outside 2 to 42"):
        practical_salinity(1.0, 20.0)


@pytest.mark.parametrize(
    ("args", "match"),
    [
        ((42.914, 35.5), r"temp_c=35\.5 is outside -2 to 35 °C"),
        ((42.914, -2.5), r"temp_c=-2\.5 is outside -2 to 35 °C"),
        ((42.914, 15.0, -1.0), r"pressure_dbar=-1\.0 is outside 0 to 10000 dbar"),
        ((-3.0, 15.0), r"conductivity_ms_cm=-3\.0"),
        ((80.0, 15.0), r"outside 2 to 42"),
    ],
)
def test_salinity_rejects_values_outside_validity(args, match):
    with pytest.raises(ValueError, match=match):
        practical_salinity(*args)


@given(
    conductivity=st.floats(min_value=10.0, max_value=55.0),
    delta=st.floats(min_value=0.01, max_value=5.0),
    temp_c=st.floats(min_value=10.0, max_value=30.0),
)
def test_salinity_rises_with_conductivity(conductivity, delta, temp_c):
    try:
        low = practical_salinity(conductivity, temp_c)
        high = practical_salinity(conductivity + delta, temp_c)
    except ValueError:
        return  # one of the pair fell outside PSS-78's 2-42; tested above
    assert high > low


# --- Hardness ------------------------------------------------------------------------------------


def test_total_hardness_from_calcium_and_magnesium():
    # Standard Methods 2340 B: 2.497 × 40 + 4.118 × 12 = 149.296 mg/L as CaCO3 [V]
    assert total_hardness_caco3(40.0, 12.0) == pytest.approx(149.296)


@pytest.mark.parametrize(
    ("calcium", "magnesium", "match"),
    [(-1.0, 12.0, r"calcium_mg_l=-1\.0"), (40.0, -0.1, r"magnesium_mg_l=-0\.1"), (math.nan, 1.0, r"calcium_mg_l=nan")],
)
def test_total_hardness_rejects_negative_concentrations(calcium, magnesium, match):
    with pytest.raises(ValueError, match=match):
        total_hardness_caco3(calcium, magnesium)


# --- Arrays: the same formulas for many readings at once -------------------------------------------


ARRAY_CASES = [  # (function, ranges each argument is drawn from: wider than the validity ranges)
    (unionized_ammonia_fraction, [(-1.0, 15.0), (-5.0, 55.0)]),
    (unionized_ammonia_mg_l, [(-1.0, 100.0), (-1.0, 15.0), (-5.0, 55.0)]),
    (nitrogen_to_ammonia_mg_l, [(-1.0, 100.0)]),
    (oxygen_solubility_mg_l, [(-5.0, 45.0), (-1.0, 45.0), (45.0, 115.0)]),
    (oxygen_percent_saturation, [(-1.0, 30.0), (-5.0, 45.0), (-1.0, 45.0)]),
    (specific_conductance_25, [(-10.0, 100000.0), (-5.0, 45.0)]),
    (practical_salinity, [(-1.0, 70.0), (-5.0, 40.0)]),
    (total_hardness_caco3, [(-1.0, 400.0), (-1.0, 100.0)]),
]


def _float_call(function, args):
    try:
        return function(*args)
    except ValueError:
        return math.nan


@pytest.mark.parametrize(("function", "ranges"), ARRAY_CASES, ids=[f.__name__ for f, _ in ARRAY_CASES])
def test_an_array_gives_the_float_calls_results_bit_for_bit(function, ranges):
    # common practice: the array form must agree with the float form exactly, NaN where the float call refuses
    rng = np.random.default_rng(20260501)
    columns = [rng.uniform(low, high, 4000) for low, high in ranges]
    columns[0][::97] = np.nan  # a missing reading
    vector = function(*columns)
    scalar = np.array([_float_call(function, args) for args in zip(*(c.tolist() for c in columns))])
    assert type(vector) is np.ndarray and vector.dtype == float
    assert np.isnan(scalar).any() and not np.isnan(scalar).all()  # both kinds of element are exercised
    assert np.array_equal(np.isnan(vector), np.isnan(scalar))
    assert vector[~np.isnan(vector)].tobytes() == scalar[~np.isnan(scalar)].tobytes()


def test_an_array_mixes_with_float_arguments():
    temps = np.array([0.0, 20.0, 41.0])
    # Benson & Krause 1984 / USGS table: 14.621 mg/L at 0 °C, 9.092 at 20 °C, S = 0 [V]; 41 °C is outside the fit
    solubility = oxygen_solubility_mg_l(temps, 0.0)
    assert solubility[:2] == pytest.approx([14.621, 9.092], abs=0.001)
    assert math.isnan(solubility[2])
    assert solubility[1] == oxygen_solubility_mg_l(20.0, 0.0)


def test_an_empty_array_gives_an_empty_array():
    assert unionized_ammonia_fraction(np.array([]), np.array([])).shape == (0,)
    assert practical_salinity(np.array([]), np.array([])).shape == (0,)
