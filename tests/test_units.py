"""Unit conversions: against pint itself and against hand-computed values with their source."""

import math

import numpy as np
import pytest

from allolaw.errors import UserError
from allolaw.intake.units import (
    DEFAULT_ENERGY_PER_ML_O2_JOULE,
    check_unit,
    conversion,
    conversion_factor,
    convert,
    ureg,
)


def test_one_ml_o2_per_hour_is_5_583_milliwatt():
    # Hand arithmetic: 1 mL O2/h × 20.1 J/mL ÷ 3600 s/h = 0.0055833 J/s = 5.583 mW.
    # (20.1 J/mL: energy equivalent of O2 on a mixed diet — common practice, no single source.)
    assert DEFAULT_ENERGY_PER_ML_O2_JOULE == 20.1
    assert conversion_factor("mL O2/h", "W", "power") == pytest.approx(20.1 / 3600, rel=1e-12)
    assert conversion_factor("mL O2/h", "mW", "power") == pytest.approx(5.5833333, rel=1e-7)


def test_litre_o2_per_minute_uses_the_configured_energy_equivalent():
    # Hand arithmetic: 1 L O2/min = 1000 mL / 60 s = 16.667 mL/s; × 19.7 J/mL = 328.33 W.
    factor = conversion_factor("L O2/min", "W", "power", energy_per_ml_o2_joule=19.7)
    assert factor == pytest.approx(1000 / 60 * 19.7, rel=1e-12)


def test_power_to_oxygen_is_the_inverse_of_oxygen_to_power():
    there = conversion_factor("mL O2/min", "mW", "power")
    back = conversion_factor("mW", "mL O2/min", "power")
    assert there * back == pytest.approx(1.0, rel=1e-12)


def test_oxygen_to_oxygen_is_a_volume_conversion_without_energy():
    conv = conversion("L O2/h", "mL O2/min", "power")
    # 1 L/h = 1000 mL / 60 min (SI: 1 L = 1000 mL; 1 h = 60 min).
    assert conv.factor == pytest.approx(1000 / 60, rel=1e-12)
    assert conv.energy_per_ml_o2_joule is None


def test_kilogram_is_1000_gram():
    # SI definition of the prefix kilo (BIPM, SI Brochure, 9th ed. 2019, Table 7).
    assert conversion_factor("kg", "g", "mass") == pytest.approx(1000.0, rel=1e-15)


def test_cubic_micrometre_is_1e_minus_15_litre():
    # (1e-6 m)³ = 1e-18 m³ and 1 L = 1 dm³ = 1e-3 m³ (SI Brochure 2019, Table 8) → 1e-15 L.
    assert conversion_factor("um**3", "L", "volume") == pytest.approx(1e-15, rel=1e-12)
    assert conversion_factor("µm³", "um**3", "volume") == pytest.approx(1.0, rel=1e-15)


def test_attomole_per_minute_is_0_06_femtomole_per_hour():
    # Hand arithmetic: 1e-18 mol/min × 60 min/h = 6e-17 mol/h = 0.06 fmol/h.
    assert conversion_factor("amol/min", "fmol/h", "rate") == pytest.approx(0.06, rel=1e-12)


def test_celsius_to_kelvin_adds_273_15():
    # T/K = t/°C + 273.15 (SI Brochure 2019, section 2.3.1).
    conv = conversion("degC", "K")
    assert conv.factor == pytest.approx(1.0)
    assert conv.offset == pytest.approx(273.15)
    np.testing.assert_allclose(convert([0.0, 37.0, -40.0], "degC", "K"), [273.15, 310.15, 233.15])


@pytest.mark.parametrize(
    ("source", "target", "quantity"),
    [
        ("g", "kg", "mass"),
        ("mg", "g", "mass"),
        ("lb", "kg", "mass"),
        ("mW", "W", "power"),
        ("kcal/day", "W", "power"),
        ("mm", "cm", "length"),
        ("inch", "cm", "length"),
        ("um**3", "m**3", "volume"),
        ("mL", "um**3", "volume"),
        ("nmol/s", "fmol/h", "rate"),
    ],
)
def test_factor_matches_pint(source, target, quantity):
    expected = ureg.Quantity(1.0, source).to(target).magnitude
    assert conversion_factor(source, target, quantity) == pytest.approx(expected, rel=1e-12)


def test_convert_applies_the_factor_to_every_value():
    values = np.array([0.5, 2.0, 40.0])
    np.testing.assert_allclose(convert(values, "kg", "g", "mass"), values * 1000.0)


def test_unicode_oxygen_subscript_reads_like_o2():
    assert conversion_factor("mL O₂/h", "W", "power") == pytest.approx(20.1 / 3600)


@pytest.mark.parametrize(
    ("source", "target", "quantity", "expected"),
    [
        ("gramm", "g", "mass", "unknown unit 'gramm'"),
        ("kgg", "g", "mass", "unknown unit 'kgg'"),
        ("g", "cm", "length", "declared as length"),
        ("cm", "g", "mass", "declared as mass"),
        ("mL O2/h", "g", "mass", "oxygen consumption"),
        ("mL O2/kg", "W", "power", "volume of O2 per time"),
        ("", "g", "mass", "empty unit"),
        ("(g", "g", "mass", "cannot read unit"),
        ("degC", "K", "mass", "declared as mass"),
    ],
)
def test_bad_unit_raises_user_error_with_location(source, target, quantity, expected):
    where = "data/x.csv, line 7, column 'mass_unit'"
    with pytest.raises(UserError) as info:
        conversion(source, target, quantity, where=where)
    message = str(info.value)
    assert message.startswith(where)
    assert expected in message


def test_units_of_different_kinds_cannot_convert_without_a_quantity():
    with pytest.raises(UserError, match="cannot convert 'g'"):
        conversion("g", "cm")


def test_offset_unit_has_no_single_factor():
    with pytest.raises(UserError, match="offset"):
        conversion_factor("degC", "K")


def test_non_positive_energy_equivalent_is_refused():
    with pytest.raises(UserError, match="must be positive"):
        conversion("mL O2/h", "W", "power", energy_per_ml_o2_joule=0.0)


def test_check_unit_accepts_every_quantity_kind():
    for unit, quantity in [("g", "mass"), ("W", "power"), ("cm", "length"),
                           ("um**3", "volume"), ("fmol/h", "rate"), ("dimensionless",
                                                                     "dimensionless"),
                           ("m/s", "speed"), ("Hz", "frequency"), ("1/min", "frequency"),
                           ("h", "time"), ("m**2", "area"), ("ha", "area"), ("kJ", "energy"),
                           ("mol/L", "concentration"), ("count", "count"), ("K", "temperature")]:
        check_unit(unit, quantity)


def test_a_named_kind_still_refuses_a_canonical_unit_of_another_dimension():
    with pytest.raises(UserError, match="declared as speed"):
        check_unit("Hz", "speed")


def test_a_quantity_outside_the_named_kinds_is_a_description_only():
    # The canonical unit then fixes the dimensionality; the source unit must match it.
    assert check_unit("Hz", "stride frequency") == ureg.Unit("hertz")
    assert conversion_factor("1/min", "Hz", "stride frequency") == pytest.approx(1 / 60)
    with pytest.raises(UserError, match=r"'km/h' measures .*canonical unit 'Hz'"):
        conversion("km/h", "Hz", "stride frequency")


def test_kilometre_per_hour_is_one_over_3_6_metre_per_second():
    # SI Brochure, 9th ed. (BIPM 2019), Table 8: 1 km/h = (1000/3600) m/s = 1/3.6 m/s.
    assert conversion_factor("km/h", "m/s", "speed") == pytest.approx(1 / 3.6, rel=1e-12)


def test_one_per_minute_is_one_sixtieth_hertz():
    # SI Brochure, 9th ed. (BIPM 2019): Hz = s^-1 (Table 4) and 1 min = 60 s (Table 8).
    assert conversion_factor("1/min", "Hz", "frequency") == pytest.approx(1 / 60, rel=1e-12)


@pytest.mark.parametrize(
    ("source", "target", "quantity", "factor"),
    [
        # SI Brochure, 9th ed. (BIPM 2019), Table 8: 1 ha = 10^4 m^2; 1 L = 10^-3 m^3.
        ("ha", "m**2", "area", 1e4),
        ("mmol/L", "mol/m**3", "concentration", 1.0),
        # Hand arithmetic: 1 kJ = 1000 J; 1 h = 3600 s; 1 kHz = 1000 Hz.
        ("kJ", "J", "energy", 1e3),
        ("h", "s", "time", 3600.0),
        ("kHz", "Hz", "frequency", 1e3),
    ],
)
def test_new_quantity_kinds_convert_by_their_si_factors(source, target, quantity, factor):
    assert conversion_factor(source, target, quantity) == pytest.approx(factor, rel=1e-12)


@pytest.mark.parametrize("unit", ["MHz", "mhz", "HZ", "kmh", "Yr", "a"])
def test_case_clashes_and_rarely_meant_symbols_of_new_kinds_still_stop(unit):
    with pytest.raises(UserError, match=r"accepted short symbols|unknown unit"):
        check_unit(unit)


def test_log_of_converted_values_shifts_by_log_factor():
    # ln(c·x) = ln c + ln x: a unit change moves only the intercept, never the exponent.
    x = np.array([1.0, 10.0, 100.0])
    logs = np.log(convert(x, "kg", "g", "mass"))
    np.testing.assert_allclose(logs - np.log(x), math.log(1000.0))
