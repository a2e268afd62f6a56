"""Derived values against published formulas and worked examples (sources beside each)."""

import math

import pint
import pytest

from hemostream.core.derive import (Current, bsa_dubois, bsa_mosteller, cardiac_output,
                                    derive_all, mean_pressure, resistance, shock_index,
                                    stroke_volume, stroke_work_index)

ureg = pint.UnitRegistry()
# unit factors from pint (a general-purpose units library), not from hemostream.core.units
K_RES = ureg.Quantity(1, "mmHg*min/L").to("dyn*s/cm**5").magnitude   # about 79.99
K_SW = ureg.Quantity(1, "mmHg*mL").to("gram_force*m").magnitude      # about 0.0136


def test_mosteller_worked_example():
    # Mosteller RD, N Engl J Med 1987;317:1098: 180 cm, 80 kg -> 2.00 m2
    assert round(bsa_mosteller(180, 80), 2) == 2.00


def test_dubois_formula():
    # [dubois1916] Du Bois D, Du Bois EF, Arch Intern Med 1916;17:863. Worked value for
    # 170 cm, 65 kg: 1.75 m2 (BSA tables built on the formula; from memory)
    assert round(bsa_dubois(170, 65), 2) == 1.75
    # [mosteller1987]: the simplified formula was shown to agree with Du Bois's within a
    # few per cent for adults (published, Mosteller 1987)
    # both formulas agree within a few per cent for an average adult (common practice)
    assert bsa_dubois(175, 75) == pytest.approx(bsa_mosteller(175, 75), rel=0.03)


def test_svr_textbook_example():
    # Critical care texts (e.g. Marino, The ICU Book; from memory): MAP 90, CVP 5 (mm[Hg]),
    # CO 5 L/min -> SVR = 80 x 85 / 5 = 1360 dyn.s.cm-5 (the 80 being 79.99, see pint test)
    assert resistance(90, 5, 5.0) == pytest.approx(1360, rel=1e-3)


def test_map_one_third_rule():
    # common practice: MAP = DBP + (SBP - DBP)/3; 120/80 -> 93.3
    assert mean_pressure(120, 80) == pytest.approx(93.333, abs=1e-3)


def test_co_sv_hr_relation():
    # CO = HR x SV (Guyton and Hall, from memory): 70 /min x 70 mL = 4.9 L/min
    assert cardiac_output(70, 70) == pytest.approx(4.9)
    assert stroke_volume(4.9, 70) == pytest.approx(70)


def test_shock_index_normal_range():
    # Allgower and Burri 1967: normal SI 0.5-0.7; HR 70 / SBP 120 = 0.58
    assert 0.5 <= shock_index(70, 120) <= 0.7
    # common practice: SI >= 1.0 is a warning sign (HR 120, SBP 100 -> 1.2)
    assert shock_index(120, 100) >= 1.0


def test_stroke_work_index_typical_adult():
    # common practice: LVSWI normal about 50-62 g.m/m2 (from memory);
    # SVI 45 mL/m2, MAP 93, PAWP 8 -> 45 x 85 mm[Hg].mL/m2, in g.m/m2 by pint: about 52
    assert stroke_work_index(45, 93, 8) == pytest.approx(45 * 85 * K_SW, rel=1e-9)
    assert 50 <= stroke_work_index(45, 93, 8) <= 62


def _getter(values):
    return {p: Current(v, 0.0) for p, v in values.items()}


def test_missing_inputs_give_no_value():
    out, _ = derive_all(_getter({"HR": 80}), None)
    assert out == []


def test_line_preferred_over_cuff_for_shock_index():
    vals = {"HR": 100, "ABP_SYS": 100, "ABP_DIA": 60, "NIBP_SYS": 125, "NIBP_DIA": 70}
    out, eff = derive_all(_getter(vals), None)
    si = [d for d in out if d.param == "SI"]
    assert si and si[0].value == pytest.approx(1.0)
    assert ("ABP_SYS", 0.0) in si[0].inputs


def test_measured_map_is_not_recalculated_but_used():
    vals = {"HR": 60, "ABP_SYS": 130, "ABP_DIA": 70, "ABP_MEAN": 95, "CVP": 5, "CO": 6.0}
    out, eff = derive_all(_getter(vals), None)
    names = {d.param for d in out}
    assert "MAP" not in names and eff["MAP"].value == 95
    svr = next(d for d in out if d.param == "SVR")
    # [marino2014] SVR = (MAP - CVP) / CO in dyn.s.cm-5, the factor from pint
    assert svr.value == pytest.approx(K_RES * 90 / 6.0, rel=1e-9)
    assert math.isclose(next(d for d in out if d.param == "SV").value, 100.0)


def test_incomplete_line_gives_way_to_the_cuff():
    # only a diastolic from the line (systolic and mean missing, e.g. while re-zeroing):
    # the current cuff set is used for MAP, SBP, SI and MSI (common practice: an arterial
    # pressure needs its systolic and mean from one site)
    vals = {"HR": 90, "ABP_DIA": 60, "NIBP_SYS": 120, "NIBP_DIA": 75}
    out, eff = derive_all(_getter(vals), None)
    by = {d.param: d for d in out}
    # MAP = DBP + (SBP - DBP) / 3 = 75 + 45/3 = 90 (common practice, one-third rule)
    assert by["MAP"].value == pytest.approx(90.0)
    assert eff["MAP"].value == pytest.approx(90.0) and eff["SBP"].value == 120
    # [allgower1967] SI = HR / SBP = 90 / 120 = 0.75; [liu2012] MSI = HR / MAP = 1.0
    assert by["SI"].value == pytest.approx(0.75)
    assert by["MSI"].value == pytest.approx(1.0)
    assert all(p.startswith("NIBP") or p == "HR" for p, _ in by["SI"].inputs)


def test_complete_line_still_preferred_over_cuff():
    vals = {"HR": 90, "ABP_SYS": 100, "ABP_MEAN": 75, "NIBP_SYS": 120, "NIBP_DIA": 75}
    out, eff = derive_all(_getter(vals), None)
    assert eff["SBP"].value == 100 and eff["MAP"].value == 75
