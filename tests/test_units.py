"""Unit conversion factors checked against pint (a general-purpose units library on PyPI)."""

import pint
import pytest

from hemostream.core.units import (BY_DIMENSION, CANONICAL, MMHG_MIN_PER_L_IN_DYN_S_CM5,
                                   MMHG_ML_IN_GF_M, UNITS, to_canonical)
from hemostream.core.wire import PARAMS

ureg = pint.UnitRegistry()

# UCUM code -> pint expression of the same unit (UCUM, Regenstrief Institute)
PINT = {"mm[Hg]": "mmHg", "kPa": "kPa", "cm[H2O]": "cmH2O", "/min": "1/min",
        "L/min": "L/min", "mL/min": "mL/min", "mL": "mL", "L": "L", "%": "percent"}


@pytest.mark.parametrize("code", [c for c in UNITS if c in PINT])
def test_linear_factors_match_pint(code):
    canon = CANONICAL[UNITS[code].dimension]
    expected = ureg.Quantity(1.0, PINT[code]).to(PINT[canon]).magnitude   # source: pint
    assert to_canonical(1.0, code) == pytest.approx(expected, rel=1e-9)


def test_reference_check_values():
    # [ucum2017] (docs/sources.md): 1 cm[H2O] = 0.7356 mm[Hg]; 1 kPa = 7.5006 mm[Hg]; and pint
    assert to_canonical(1.0, "cm[H2O]") == pytest.approx(
        ureg.Quantity(1, "cmH2O").to("mmHg").magnitude, rel=1e-9)
    assert to_canonical(1.0, "cm[H2O]") == pytest.approx(0.7356, abs=1e-4)
    assert to_canonical(1.0, "kPa") == pytest.approx(7.5006, abs=1e-4)


@pytest.mark.parametrize("f", [-40.0, 32.0, 98.6, 104.0])
def test_fahrenheit_matches_pint(f):
    expected = ureg.Quantity(f, ureg.degF).to(ureg.degC).magnitude          # source: pint
    assert to_canonical(f, "[degF]") == pytest.approx(expected, abs=1e-9)


def test_resistance_factor_matches_pint():
    # [marino2014] (docs/sources.md): 1 mm[Hg].min/L = 79.99 dyn.s.cm-5, the "80" of
    # SVR = 80 (MAP-CVP)/CO
    expected = ureg.Quantity(1, "mmHg*min/L").to("dyn*s/cm**5").magnitude    # source: pint
    assert MMHG_MIN_PER_L_IN_DYN_S_CM5 == pytest.approx(expected, rel=1e-9)
    assert round(expected) == 80


def test_stroke_work_factor_matches_pint():
    # common practice: 0.0136 converts mm[Hg].mL to g.m (gram-force metre)
    expected = ureg.Quantity(1, "mmHg*mL").to("gram_force*m").magnitude      # source: pint
    assert MMHG_ML_IN_GF_M == pytest.approx(expected, rel=1e-9)
    assert MMHG_ML_IN_GF_M == pytest.approx(0.0136, abs=1e-4)


def test_every_parameter_has_units_of_its_dimension():
    for p, spec in PARAMS.items():
        assert spec.canonical_unit in BY_DIMENSION[spec.dimension], p
