"""Alveolar equations, dead space, shunt and bedside indices against published sources."""

import subprocess
import sys

import numpy as np
import pytest
from hypothesis import given, strategies as st

from ventcast.physiology import indices
from ventcast.physiology.bloodgas import oxygen
from ventcast.physiology.gasexchange import alveolar


@pytest.mark.parametrize("t,expected", [(37, 46.95), (39, 52.32), (40, 55.19), (35, 42.07), (20, 17.47)])
def test_antoine_row_16(t, expected):
    """Row 16: Antoine equation for water (8.07131, 1730.63, 233.426)."""
    assert alveolar.water_vapour_pressure_antoine(t) == pytest.approx(expected, abs=0.05)


def test_water_vapour_against_iapws():
    """Outside reference: IAPWS-IF97 saturation pressure at 37 degC is ~47.1 mmHg (Antoine 46.95)."""
    iapws = pytest.importorskip("iapws")
    p_mpa = iapws.iapws97._PSat_T(310.15)
    p_mmhg = p_mpa * 1e6 / 133.322
    assert alveolar.water_vapour_pressure_antoine(37.0) == pytest.approx(p_mmhg, abs=0.3)


@pytest.mark.parametrize("fio2,expected", [(0.21, 101.83), (0.30, 166.90), (0.50, 311.50),
                                           (0.80, 528.40), (1.00, 673.00)])
def test_alveolar_gas_equation_rows_17_18(fio2, expected):
    """Rows 17-18: full alveolar gas equation (Riley & Cournand 1949), PaCO2 40, R 0.8, PB 760."""
    assert alveolar.alveolar_po2(fio2, 40, 0.8, 760) == pytest.approx(expected, abs=0.06)


def test_alveolar_gas_at_fio2_one_is_pb_minus_water_minus_paco2():
    ph2o = alveolar.water_vapour_pressure_antoine(37)
    assert alveolar.alveolar_po2(1.0, 52, 0.7) == pytest.approx(760 - ph2o - 52, abs=1e-9)


def test_simplified_alveolar_gas():
    assert alveolar.alveolar_po2_simplified(0.21, 40) == pytest.approx(99.73, abs=0.06)


@given(st.floats(0.21, 0.99), st.floats(0.01, 0.2), st.floats(20, 80), st.floats(0.7, 1.0))
def test_alveolar_po2_increases_with_fio2(f, df, paco2, r):
    assert alveolar.alveolar_po2(min(f + df, 1.0), paco2, r) > alveolar.alveolar_po2(f, paco2, r)


def test_alveolar_ventilation_equation_row_19():
    """Row 19: PaCO2 = 0.863 VCO2 / VA: VCO2 200, VA 4.3 -> 40.14 mmHg; VA 5.0 -> 34.52."""
    assert alveolar.paco2_alveolar_ventilation(200, 4.3) == pytest.approx(40.14, abs=0.01)
    assert alveolar.paco2_alveolar_ventilation(200, 5.0) == pytest.approx(34.52, abs=0.01)
    assert alveolar.alveolar_ventilation_from_paco2(200, 40.14) == pytest.approx(4.3, abs=0.01)


def test_enghoff_row_20():
    """Row 20: Enghoff VD/VT with PECO2 = 0.863 VCO2/VE: VCO2 200, VE 8, PaCO2 40 -> 0.461."""
    pe = alveolar.mixed_expired_pco2(200, 8)
    assert pe == pytest.approx(21.6, abs=0.05)
    assert alveolar.dead_space_enghoff(40, pe) == pytest.approx(0.461, abs=0.001)
    assert alveolar.dead_space_bohr(35, pe) == pytest.approx((35 - pe) / 35)


def test_berggren_row_21():
    """Row 21: Berggren shunt, Hb 15, FiO2 1, PaCO2 40, PaO2 200, SvO2 0.70 -> 0.186."""
    pao2_ideal = alveolar.alveolar_po2(1.0, 40, 0.8)
    cc = oxygen.o2_content(pao2_ideal, oxygen.saturation(pao2_ideal), 15)
    ca = oxygen.o2_content(200, oxygen.saturation(200), 15)
    pv = oxygen.po2_from_saturation(0.70)
    cv = oxygen.o2_content(pv, 0.70, 15)
    assert cc == pytest.approx(22.12, abs=0.02)
    assert alveolar.shunt_berggren(cc, ca, cv) == pytest.approx(0.186, abs=0.002)


def test_ventilatory_ratio_row_26():
    """Row 26: Sinha 2009: VE 10 L/min, PaCO2 45, PBW 70 -> 1.714."""
    assert indices.ventilatory_ratio(10, 45, 70) == pytest.approx(1.714, abs=0.001)


@pytest.mark.parametrize("sex,h,expected", [("male", 175, 70.57), ("female", 160, 52.42),
                                            ("male", 180, 75.12), ("female", 152.4, 45.5)])
def test_pbw_row_27(sex, h, expected):
    """Row 27: ARDS Network 2000 predicted body weight."""
    assert indices.predicted_body_weight(h, sex) == pytest.approx(expected, abs=0.01)


def test_ml_per_kg():
    assert indices.ml_per_kg_pbw(423.4, 70.566) == pytest.approx(6.0, abs=0.01)


@pytest.mark.parametrize("pf,peep,cat", [(150, 5, "moderate"), (100, 8, "severe"), (200, 10, "moderate"),
                                         (250, 5, "mild"), (301, 5, "none"), (150, 3, "not assessable")])
def test_berlin_row_35(pf, peep, cat):
    """Row 35: Berlin definition (ARDS Definition Task Force 2012): P/F 150 on PEEP 5 is moderate."""
    assert indices.berlin_category(pf, peep) == cat


def test_oxygenation_indices():
    """OI = FiO2 x Pmean x 100 / PaO2 (digest 5.1 check: 0.6, 18, 70 -> 15.4); P/F, A-a, a/A."""
    assert indices.oxygenation_index(0.6, 18, 70) == pytest.approx(15.43, abs=0.01)
    assert indices.pf_ratio(68, 0.6) == pytest.approx(113.33, abs=0.01)
    assert indices.aa_gradient(300, 68) == pytest.approx(232)
    assert indices.aa_ratio(300, 60) == pytest.approx(0.2)


@pytest.mark.parametrize("value", [60, 21, 100])
def test_fio2_percentage_is_questioned(value):
    with pytest.raises(ValueError, match=r"did you mean \d\.\d\d\?"):
        alveolar.alveolar_po2(value, 40)


@pytest.mark.parametrize("value", [0.1, 1.5, -0.3, float("nan")])
def test_fio2_out_of_range(value):
    with pytest.raises(ValueError, match="FiO2"):
        alveolar.inspired_po2(value)


def test_arrays_are_accepted():
    out = alveolar.alveolar_po2(np.array([0.21, 0.5, 1.0]), np.array([40, 40, 40]))
    assert out.shape == (3,)


def test_engine_imports_no_qt():
    """The engine never imports Qt or pyqtgraph (architecture contract)."""
    code = ("import sys, ventcast.physiology as physiology, ventcast.physiology.bloodgas.oxygen, "
            "ventcast.physiology.indices\n"
            "import pkgutil, importlib\n"
            "for m in pkgutil.walk_packages(physiology.__path__, 'ventcast.physiology.'):\n"
            "    importlib.import_module(m.name)\n"
            "bad = [m for m in sys.modules if m.split('.')[0] in ('PySide6', 'shiboken6', 'pyqtgraph', 'app')\n"
            "       or m.startswith('ventcast.app')]\n"
            "print(bad); sys.exit(1 if bad else 0)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert out.returncode == 0, out.stdout + out.stderr
