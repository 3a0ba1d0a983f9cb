"""Water chemistry derived from readings: un-ionized ammonia, oxygen saturation, conductivity at 25 °C,
practical salinity and total hardness.

Pure functions with no Django imports, so they can be tested without a database and reused from a
notebook. Every published method is used only inside the range it was fitted or defined for: outside
it a function raises ValueError naming the argument, its value and the valid range, rather than
returning an extrapolated number that looks as trustworthy as a real one.

Unit conventions (the same as `colonies.parameters`):
- Total ammonia and un-ionized ammonia are both expressed *as nitrogen* (mg/L NH3-N, i.e. mg/L N),
  like test-kit "-N" scales and the US EPA 2013 ammonia criteria. `nitrogen_to_ammonia_mg_l` converts
  to mass of NH3 when a paper quotes mg/L NH3.
- Dissolved oxygen in mg/L; barometric pressure in kPa (the unit most lab barometers show).
- Salinity is practical salinity (PSS-78, dimensionless, numerically close to g/kg).
- Conductivity in µS/cm for the 25 °C compensation and in mS/cm for PSS-78 (the unit of its
  reference conductivity, 42.914 mS/cm).

Floats or arrays. Every function also takes numpy arrays (an export computes a few thousand checks at a
time) and returns an array whose elements are exactly the floats the float call gives, bit for bit, with
NaN where the float call raises ValueError (an input outside the validity range, or NaN for a missing
reading). There is one formula per method, run by both: arithmetic is IEEE either way, and on arrays
the powers and exponentials are Python's own `**` and `math.exp` element by element (`_PerElement`,
`_exp`), because numpy's vectorised pow and exp differ from the C library's in the last bit for about
5 % of arguments (AVX-512 kernels), which would let an export disagree with what a page or flag shows.
"""
import itertools
import math
import operator

import numpy as np

Value = float | np.ndarray
_Array = np.ndarray  # one global name: the float path's isinstance checks are on every call

KELVIN_OFFSET = 273.15  # exact; the source equations below take T in kelvin = °C + 273.15
STANDARD_PRESSURE_KPA = 101.325  # 1 atm

# Molar masses (g/mol) for the NH3-N to NH3 conversion.
MOLAR_MASS_N = 14.007
MOLAR_MASS_NH3 = 17.031

# Validity ranges, inclusive. Each says where it comes from.
AMMONIA_TEMP_RANGE_C = (0.0, 50.0)  # Emerson et al. (1975) fitted pKa over 0-50 °C
PH_RANGE = (0.0, 14.0)  # our choice: the range of a pH scale in dilute water; the fit has no pH limit
OXYGEN_TEMP_RANGE_C = (0.0, 40.0)  # Benson & Krause (1984) data, as tabulated by USGS / Standard Methods
OXYGEN_SALINITY_RANGE = (0.0, 40.0)  # salinity range of the Benson & Krause fit
PRESSURE_RANGE_KPA = (50.0, 110.0)  # our plausibility guard for barometric pressure (~0.49-1.09 atm)
CONDUCTIVITY_TEMP_RANGE_C = (0.0, 40.0)  # our choice: linear compensation degrades far from 25 °C
ALPHA_RANGE = (0.0, 0.03)  # our choice: natural waters ~0.018-0.022 per °C; keeps 1 + α(t - 25) > 0
SALINITY_TEMP_RANGE_C = (-2.0, 35.0)  # UNESCO (1983) Tech. Pap. 44: PSS-78 defined for -2 to 35 °C
SALINITY_PRESSURE_RANGE_DBAR = (0.0, 10000.0)  # UNESCO (1983) Tech. Pap. 44: 0 to 10000 dbar
SALINITY_RANGE = (2.0, 42.0)  # UNESCO (1983) Tech. Pap. 44: PSS-78 valid for 2 <= S <= 42

# Conductivity of standard seawater, S = 35 at 15 °C and 0 dbar (UNESCO 1983, Tech. Pap. 44).
C_35_15_0_MS_CM = 42.914


def _require_range(name: str, value: Value, valid: tuple[float, float], unit: str, why: str) -> bool | np.ndarray:
    """True if a float lies in `valid` (inclusive), else ValueError; for an array, the mask of elements inside."""
    low, high = valid
    if isinstance(value, _Array):
        return (value >= low) & (value <= high)  # NaN compares False: outside
    # Written as "not inside" so that NaN fails too.
    if not low <= value <= high:
        unit_text = f" {unit}" if unit else ""
        raise ValueError(f"{name}={value!r} is outside {low:g} to {high:g}{unit_text} ({why})")
    return True


def _require_non_negative(name: str, value: Value, unit: str) -> bool | np.ndarray:
    if isinstance(value, _Array):
        return np.isfinite(value) & (value >= 0)
    if not (value >= 0 and math.isfinite(value)):
        raise ValueError(f"{name}={value!r} {unit} is not valid: it must be a finite value of 0 or more")
    return True


def _where(valid: bool | np.ndarray, formula, *args: Value) -> Value:
    """formula(*args) where the inputs are valid: a float call has passed its checks (valid is True); for
    arrays the formula runs on the valid elements only and the others are NaN."""
    if valid is True:
        return formula(*args)
    arrays = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in args))
    valid = np.broadcast_to(valid, arrays[0].shape)
    out = np.full(arrays[0].shape, np.nan)
    out[valid] = formula(*(a[valid].view(_PerElement) for a in arrays))
    return out


def _masked(valid: bool | np.ndarray, value: Value) -> Value:
    return value if valid is True else np.where(valid, value, np.nan)


def _elementwise(function, *args) -> "_PerElement":
    """function(*args) element by element, on Python floats (and ints) as a float call gets them."""
    arrays = [a for a in args if isinstance(a, _Array)]
    if len({a.shape for a in arrays}) > 1:
        return _elementwise(function, *np.broadcast_arrays(*(np.asarray(a) for a in args)))
    shape = arrays[0].shape
    columns = [a.ravel().tolist() if isinstance(a, _Array) else itertools.repeat(a) for a in args]
    out = np.fromiter(map(function, *columns), dtype=float, count=arrays[0].size)
    return out.reshape(shape).view(_PerElement)


class _PerElement(np.ndarray):
    """The array the formulas see: `**` is Python's float power element by element (the C library's
    pow, as a float call uses), not numpy's; every other operation is numpy's, whose results keep this
    type. Never leaves this module: `_where` copies the results into a plain array."""

    def __pow__(self, exponent):
        return _elementwise(operator.pow, self, exponent)

    def __rpow__(self, base):
        return _elementwise(operator.pow, base, self)


def _exp(x: Value) -> Value:
    return _elementwise(math.exp, x) if isinstance(x, _Array) else math.exp(x)


def _sqrt(x: Value) -> Value:
    # IEEE 754 rounds a square root correctly, so numpy's and the C library's agree to the bit.
    return np.sqrt(x) if isinstance(x, _Array) else math.sqrt(x)


# --- Ammonia -------------------------------------------------------------------------------------

def unionized_ammonia_fraction(ph: Value, temp_c: Value) -> Value:
    """Fraction (0-1) of total ammonia present as un-ionized NH3.

    Emerson, Russo, Lund & Thurston (1975), J. Fish. Res. Board Can. 32:2379-2383:
    pKa = 0.09018 + 2729.92 / T with T = °C + 273.15, fraction = 1 / (1 + 10^(pKa - pH)).
    Fitted for fresh water at 0-50 °C; it ignores ionic strength, so it slightly overstates NH3 in
    seawater. pH is accepted over 0-14.
    """
    valid = (_require_range("ph", ph, PH_RANGE, "", "the pH scale of dilute water")
             & _require_range("temp_c", temp_c, AMMONIA_TEMP_RANGE_C, "°C", "Emerson et al. 1975 fitted range"))
    return _where(valid, _emerson_fraction, ph, temp_c)


def _emerson_fraction(ph: Value, temp_c: Value) -> Value:
    # 273.15, not 273, and 2729.92, not the misprint 2727.92 that circulates.
    pka = 0.09018 + 2729.92 / (temp_c + KELVIN_OFFSET)
    return 1.0 / (1.0 + 10.0 ** (pka - ph))


def unionized_ammonia_mg_l(total_ammonia_n_mg_l: Value, ph: Value, temp_c: Value) -> Value:
    """Un-ionized ammonia in mg/L NH3-N from total ammonia nitrogen in mg/L N (both as nitrogen)."""
    valid = _require_non_negative("total_ammonia_n_mg_l", total_ammonia_n_mg_l, "mg/L N")
    return _masked(valid, total_ammonia_n_mg_l * unionized_ammonia_fraction(ph, temp_c))


def nitrogen_to_ammonia_mg_l(ammonia_n_mg_l: Value) -> Value:
    """Convert mg/L NH3-N (as nitrogen) to mg/L NH3 (mass of the molecule): × 17.031 / 14.007."""
    valid = _require_non_negative("ammonia_n_mg_l", ammonia_n_mg_l, "mg/L N")
    return _masked(valid, ammonia_n_mg_l * MOLAR_MASS_NH3 / MOLAR_MASS_N)


# --- Oxygen --------------------------------------------------------------------------------------

def oxygen_solubility_mg_l(temp_c: Value, salinity: Value = 0.0, pressure_kpa: Value = STANDARD_PRESSURE_KPA) -> Value:
    """Dissolved oxygen (mg/L) in equilibrium with water-saturated air.

    Benson & Krause (1984), Limnol. Oceanogr. 29:620-632, in the form used by Standard Methods
    4500-O and the USGS DO tables (USGS OWQ Technical Memorandum 99.01), with their salinity term and
    barometric-pressure correction (water vapour pressure and the θ term for the non-ideal gas).
    Valid for 0-40 °C and salinity 0-40; pressure is guarded to 50-110 kPa (any barometer reading
    on the Earth's surface, about 0.49-1.09 atm).
    """
    valid = (_require_range("temp_c", temp_c, OXYGEN_TEMP_RANGE_C, "°C", "Benson & Krause 1984 range")
             & _require_range("salinity", salinity, OXYGEN_SALINITY_RANGE, "", "Benson & Krause 1984 range")
             & _require_range("pressure_kpa", pressure_kpa, PRESSURE_RANGE_KPA, "kPa", "plausible barometric pressure"))
    return _where(valid, _benson_krause, temp_c, salinity, pressure_kpa)


def _benson_krause(temp_c: Value, salinity: Value, pressure_kpa: Value) -> Value:
    t = temp_c + KELVIN_OFFSET
    t2 = t**2
    ln_c = (-139.34411 + 1.575701e5 / t - 6.642308e7 / t2 + 1.243800e10 / t**3 - 8.621949e11 / t**4)
    ln_c -= salinity * (1.7674e-2 - 1.0754e1 / t + 2.1407e3 / t2)
    c_star = _exp(ln_c)

    p_atm = pressure_kpa / STANDARD_PRESSURE_KPA
    # Water vapour pressure (atm) and θ: at lower pressure less O2 dissolves, and not exactly in
    # proportion, because the water vapour share of the air is fixed by temperature.
    p_wv = _exp(11.8571 - 3840.70 / t - 216961.0 / t2)
    theta = 0.000975 - 1.426e-5 * temp_c + 6.436e-8 * temp_c**2
    return c_star * p_atm * (1 - p_wv / p_atm) * (1 - theta * p_atm) / ((1 - p_wv) * (1 - theta))


def oxygen_percent_saturation(
    do_mg_l: Value, temp_c: Value, salinity: Value = 0.0, pressure_kpa: Value = STANDARD_PRESSURE_KPA
) -> Value:
    """Dissolved oxygen as % of air saturation (can exceed 100: supersaturation is real)."""
    valid = _require_non_negative("do_mg_l", do_mg_l, "mg/L")
    return _masked(valid, 100.0 * do_mg_l / oxygen_solubility_mg_l(temp_c, salinity, pressure_kpa))


# --- Conductivity and salinity -------------------------------------------------------------------

def specific_conductance_25(conductivity_us_cm: Value, temp_c: Value, alpha: Value = 0.0191) -> Value:
    """Conductivity compensated to 25 °C (µS/cm): κ25 = κt / (1 + α (t - 25)).

    Linear compensation as in Standard Methods 2510; α = 0.0191 per °C suits KCl-like water. Only
    for raw (uncompensated) readings: most meters already display κ25. Natural waters are not
    quite linear (ISO 7888 tabulates factors), so we stay within 0-40 °C.
    """
    valid = (_require_non_negative("conductivity_us_cm", conductivity_us_cm, "µS/cm")
             & _require_range("temp_c", temp_c, CONDUCTIVITY_TEMP_RANGE_C, "°C", "range for linear compensation")
             & _require_range("alpha", alpha, ALPHA_RANGE, "per °C", "plausible linear temperature coefficient"))
    return _masked(valid, conductivity_us_cm / (1 + alpha * (temp_c - 25.0)))


def _pss78_salinity(ratio: Value, t68: Value, pressure_dbar: Value) -> Value:
    """PSS-78 salinity from the conductivity ratio R = C / C(35, 15, 0), unguarded.

    UNESCO (1983) Tech. Pap. Mar. Sci. 44 (Fofonoff & Millard), eqs. for Rp, rt and S. Takes IPTS-68
    temperature, as the paper's check values do. Kept separate from the public function so tests can
    use the paper's 40 °C check value, which lies outside the -2..35 °C range we enforce.
    """
    p = pressure_dbar
    t = t68
    # rt: conductivity ratio of standard seawater (S = 35) at t to that at 15 °C.
    rt = 0.6766097 + t * (2.00564e-2 + t * (1.104259e-4 + t * (-6.9698e-7 + t * 1.0031e-9)))
    # Rp: pressure effect on conductivity.
    rp = 1 + p * (2.070e-5 + p * (-6.370e-10 + p * 3.989e-15)) / (
        1 + 3.426e-2 * t + 4.464e-4 * t**2 + (4.215e-1 - 3.107e-3 * t) * ratio
    )
    r_t = ratio / (rp * rt)
    x = _sqrt(r_t)
    a = (0.0080, -0.1692, 25.3851, 14.0941, -7.0261, 2.7081)
    b = (0.0005, -0.0056, -0.0066, -0.0375, 0.0636, -0.0144)
    dt = t - 15.0
    powers = [x**i for i in range(6)]
    salinity = sum(ai * xi for ai, xi in zip(a, powers))
    salinity += dt / (1 + 0.0162 * dt) * sum(bi * xi for bi, xi in zip(b, powers))
    return salinity


def practical_salinity(conductivity_ms_cm: Value, temp_c: Value, pressure_dbar: Value = 0.0) -> Value:
    """Practical salinity (PSS-78) from in-situ conductivity (mS/cm), temperature (°C) and pressure.

    UNESCO (1983) Tech. Pap. Mar. Sci. 44 (Fofonoff & Millard), with C(35, 15, 0) = 42.914 mS/cm.
    temp_c is ITS-90 (what modern thermometers report); it is converted to the IPTS-68 scale of
    the algorithm with t68 = 1.00024 t90. Valid for -2 to 35 °C, 0-10000 dbar and 2 <= S <= 42:
    fresh water (S < 2) raises ValueError because PSS-78 is not defined there.
    """
    valid = (_require_non_negative("conductivity_ms_cm", conductivity_ms_cm, "mS/cm")
             & _require_range("temp_c", temp_c, SALINITY_TEMP_RANGE_C, "°C", "PSS-78 validity, UNESCO 1983")
             & _require_range("pressure_dbar", pressure_dbar, SALINITY_PRESSURE_RANGE_DBAR, "dbar",
                              "PSS-78 validity, UNESCO 1983"))
    salinity = _where(valid, _pss78_from_conductivity, conductivity_ms_cm, temp_c, pressure_dbar)
    low, high = SALINITY_RANGE
    if isinstance(salinity, np.ndarray):
        return _masked(_require_range("salinity", salinity, SALINITY_RANGE, "", "PSS-78 validity"), salinity)
    if not low <= salinity <= high:
        raise ValueError(
            f"practical salinity {salinity:.3f} from conductivity_ms_cm={conductivity_ms_cm!r}, "
            f"temp_c={temp_c!r} is outside {low:g} to {high:g} (PSS-78 validity, UNESCO 1983)"
        )
    return salinity


def _pss78_from_conductivity(conductivity_ms_cm: Value, temp_c: Value, pressure_dbar: Value) -> Value:
    return _pss78_salinity(conductivity_ms_cm / C_35_15_0_MS_CM, 1.00024 * temp_c, pressure_dbar)


# --- Hardness ------------------------------------------------------------------------------------

def total_hardness_caco3(calcium_mg_l: Value, magnesium_mg_l: Value) -> Value:
    """Total hardness in mg/L as CaCO3 from Ca and Mg in mg/L: 2.497 Ca + 4.118 Mg (Standard Methods 2340 B)."""
    valid = (_require_non_negative("calcium_mg_l", calcium_mg_l, "mg/L")
             & _require_non_negative("magnesium_mg_l", magnesium_mg_l, "mg/L"))
    return _masked(valid, 2.497 * calcium_mg_l + 4.118 * magnesium_mg_l)
