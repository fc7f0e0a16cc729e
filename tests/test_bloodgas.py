"""Blood-gas chemistry against published sources.

Check numbers ("row N") are those of the project's physiology digest, section 9;
each test names the published equation or table it rests on.
"""

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from ventcast.physiology.bloodgas import acidbase, carbon_dioxide, oxygen

# Severinghaus JW. J Appl Physiol 1979;46:599-602, Table 1 (PO2 mmHg -> %S), all 51 points.
SEVERINGHAUS_TABLE_1 = [
    (1, 0.60), (2, 1.19), (4, 2.56), (6, 4.37), (8, 6.68), (10, 9.58), (12, 12.96),
    (14, 16.89), (16, 21.40), (18, 26.50), (20, 32.12), (22, 37.60), (24, 43.14),
    (26, 48.27), (28, 53.16), (30, 57.54), (32, 61.69), (34, 65.16), (36, 68.63),
    (38, 71.94), (40, 74.69), (42, 77.29), (44, 79.55), (46, 81.71), (48, 83.52),
    (50, 85.08), (52, 86.59), (54, 87.70), (56, 88.93), (58, 89.95), (60, 90.85),
    (65, 92.73), (70, 94.06), (75, 95.10), (80, 95.84), (85, 96.42), (90, 96.88),
    (95, 97.25), (100, 97.49), (110, 97.91), (120, 98.21), (130, 98.44), (140, 98.62),
    (150, 98.77), (175, 99.03), (200, 99.20), (225, 99.32), (250, 99.41), (300, 99.53),
    (400, 99.65), (500, 99.72),
]


def test_severinghaus_table_1_has_51_points():
    assert len(SEVERINGHAUS_TABLE_1) == 51


def test_severinghaus_eq1_against_table_1():
    """Severinghaus 1979 Eq. 1 fits Table 1 within 0.0056 S everywhere (paper: +/-0.0055)."""
    po2 = np.array([p for p, _ in SEVERINGHAUS_TABLE_1], dtype=float)
    s_table = np.array([s for _, s in SEVERINGHAUS_TABLE_1]) / 100.0
    err = np.abs(oxygen.saturation_severinghaus(po2) - s_table)
    assert err.max() <= 0.0056, err.max()


@pytest.mark.parametrize("po2,expected", [(26.8, 0.49859), (40, 0.74946), (60, 0.90580),
                                          (80, 0.95725), (100, 0.97747), (150, 0.99316)])
def test_severinghaus_eq1_values(po2, expected):
    """Row 1 and the Eq. 1 check table (Severinghaus 1979 Eq. 1), tolerance 1e-4."""
    assert oxygen.saturation_severinghaus(po2) == pytest.approx(expected, abs=1e-4)


@pytest.mark.parametrize("s,expected", [(0.50, 26.857), (0.75, 40.040), (0.90, 58.655),
                                        (0.95, 75.668), (0.97, 90.573), (0.88, 54.670)])
def test_ellis_exact_inverse(s, expected):
    """Row 4: Ellis 1989 exact inverse of Severinghaus Eq. 1."""
    assert oxygen.po2_from_saturation_ellis(s) == pytest.approx(expected, abs=0.01)


def test_severinghaus_eq2_is_an_approximation_of_the_inverse():
    """Severinghaus 1979 Eq. 2 lies within 1.3 % of the exact inverse (values of the digest)."""
    s = np.array([0.5, 0.75, 0.9, 0.95, 0.97, 0.88])
    approx = oxygen.po2_from_saturation_severinghaus_approx(s)
    exact = oxygen.po2_from_saturation_ellis(s)
    assert np.all(np.abs(approx / exact - 1) < 0.013)
    assert approx[2] == pytest.approx(57.983, abs=0.01)


def test_table_1_spot_values():
    """Row 3: Table 1 at PO2 60 / 100 / 40 is 90.85 / 97.49 / 74.69 %S; Eq. 1 is within 0.0056."""
    table = dict(SEVERINGHAUS_TABLE_1)
    for p in (60, 100, 40):
        assert abs(oxygen.saturation_severinghaus(p) - table[p] / 100) < 0.0056


def test_kelman_polynomial_at_100():
    """Row 5: Kelman 1966 polynomial at x = 100 mmHg gives 0.9749 (= Severinghaus Table 1)."""
    assert oxygen.saturation_kelman(100.0) == pytest.approx(0.9749, abs=1e-4)


def test_kelman_and_severinghaus_disagree_in_the_steep_part_by_up_to_about_2_percent():
    """Digest 1.2: Kelman differs from Table 1 by up to ~2.2 %S at 14-20 mmHg."""
    po2 = np.linspace(10, 500, 200)
    diff = np.abs(oxygen.saturation_kelman(po2) - oxygen.saturation_severinghaus(po2))
    assert diff.max() < 0.03


def test_kelman_virtual_factor():
    """Row 6: Kelman 1966 virtual-PO2 factor at pH 7.2, PCO2 60, 38 degC is 0.7681."""
    assert oxygen.virtual_po2_factor_kelman(7.2, 60, 38) == pytest.approx(0.7681, abs=1e-4)


@pytest.mark.parametrize("kw,expected", [({"ph": 7.2}, 32.29), ({"temperature": 39}, 29.99),
                                         ({"ph": 7.6}, 22.34), ({"pco2": 80}, 28.00),
                                         ({"temperature": 33}, 21.53)])
def test_invivo_p50(kw, expected):
    """Row 7: in-vivo P50 = 26.86 / Kelman factor (Kelman 1966, Severinghaus 1979)."""
    assert oxygen.p50(**kw) == pytest.approx(expected, abs=0.05)


@pytest.mark.parametrize("kw,expected", [({"ph": 7.2}, 31.14), ({"temperature": 39}, 29.84),
                                         ({}, 26.80), ({"dpg_mmol_l": 6.0}, 27.84)])
def test_dash_p50(kw, expected):
    """Row 8: Dash, Korman & Bassingthwaighte 2016, Eqs. 9-10."""
    assert oxygen.p50_dash(**kw) == pytest.approx(expected, abs=0.05)


@pytest.mark.parametrize("po2,ph,pco2,t,s_sev", [(80, 7.20, 60, 38, 0.9116), (60, 7.30, 50, 37, 0.8761),
                                                 (60, 7.50, 30, 37, 0.9298), (100, 7.40, 40, 39, 0.9690),
                                                 (40, 7.35, 46, 37, 0.7196)])
def test_corrected_saturation(po2, ph, pco2, t, s_sev):
    """Digest 1.2 check table: Kelman virtual PO2 then Severinghaus Eq. 1."""
    assert oxygen.saturation(po2, ph, pco2, t) == pytest.approx(s_sev, abs=1e-4)


def test_o2_content_row_9():
    """Row 9: CaO2 = 1.34 Hb S + 0.003 PO2 = 19.90 mL/dL at Hb 15, PO2 100, S 0.975."""
    assert oxygen.o2_content(100, 0.975, 15) == pytest.approx(19.90, abs=0.01)
    assert oxygen.o2_content(100, 0.975, 15, hufner=1.39) == pytest.approx(20.63, abs=0.01)


def test_fact_one_litre_of_blood_carries_about_200_ml_o2():
    """Common practice: 1 L of blood at Hb 15 g/dL, fully saturated, carries ~200 mL O2 (within 5 %)."""
    ml_per_litre = 10 * oxygen.o2_content(100, 1.0, 15)
    assert abs(ml_per_litre - 200) / 200 < 0.05


def test_fact_one_litre_of_dry_air_holds_about_209_ml_o2():
    """Common practice: dry air is 20.95 % O2, so 1 L holds ~209 mL O2 (and ~1 L of blood's worth)."""
    from ventcast.physiology.gasexchange.alveolar import inspired_po2, water_vapour_pressure_antoine
    pb = 760.0
    dry_po2 = inspired_po2(0.21, pb) * pb / (pb - water_vapour_pressure_antoine(37.0))
    ml_o2_per_litre_air = 1000 * dry_po2 / pb
    assert ml_o2_per_litre_air == pytest.approx(209, abs=1.5)
    assert abs(ml_o2_per_litre_air - 10 * oxygen.o2_content(100, 1.0, 15)) / 209 < 0.05


@pytest.mark.parametrize("pco2,ph,s,expected", [(40, 7.40, 0.975, 47.59), (46, 7.37, 0.75, 51.80),
                                                (40, 7.40, 0.75, 48.03), (60, 7.30, 0.97, 57.74),
                                                (30, 7.50, 0.98, 44.18)])
def test_kelman_co2_content(pco2, ph, s, expected):
    """Rows 10-11: Kelman 1967 whole-blood CO2 content, Hct 0.45, 37 degC."""
    assert carbon_dioxide.co2_content_kelman(pco2, ph, s, 0.45) == pytest.approx(expected, abs=0.05)


def test_kelman_co2_content_on_buffer_line():
    """Digest 2.2: with the West/Wagner buffer line pH (incl. oxylabile term), 47.70 and 52.13 mL/dL."""
    for pco2, s, ph_exp, c_exp in [(40, 0.975, 7.401, 47.70), (46, 0.75, 7.373, 52.13)]:
        ph = acidbase.ph_blood_buffer_line(pco2, s, 15.0)
        assert ph == pytest.approx(ph_exp, abs=0.001)
        assert carbon_dioxide.co2_content_kelman(pco2, ph, s, 0.45) == pytest.approx(c_exp, abs=0.05)


def test_henderson_hasselbalch_row_12():
    """Row 12: pH 7.40, PCO2 40 -> HCO3 24.50 mmol/L (pK 6.1, solubility 0.0307)."""
    assert acidbase.bicarbonate_henderson_hasselbalch(7.40, 40) == pytest.approx(24.50, abs=0.01)
    assert acidbase.ph_henderson_hasselbalch(24, 40) == pytest.approx(7.391, abs=0.001)


def test_van_slyke_row_13():
    """Row 13: Van Slyke (Lang & Zander 2002): pH 7.20, PCO2 40, Hb 15 -> BE -12.36."""
    assert acidbase.base_excess_van_slyke(7.20, 40, 15, 1.0) == pytest.approx(-12.36, abs=0.05)
    assert acidbase.base_excess_van_slyke(7.40, 40, 15, 1.0) == pytest.approx(0.0, abs=0.05)
    # A purely acute respiratory acidosis keeps BE near zero.
    assert acidbase.base_excess_van_slyke(7.30, 60, 15, 1.0) == pytest.approx(0.98, abs=0.05)


def test_standard_base_excess_row_14():
    """Row 14: SBE = HCO3 - 24.8 + 16.2 (pH - 7.40): pH 7.20, HCO3 15 -> -13.04."""
    assert acidbase.standard_base_excess(7.20, 15) == pytest.approx(-13.04, abs=0.01)


def test_acute_respiratory_acidosis_row_15():
    """Row 15: PCO2 40 -> 60 acute: HCO3 24 -> 26 and pH 7.250 (compensation rule + HH)."""
    ph0 = acidbase.ph_henderson_hasselbalch(24, 40)
    assert acidbase.ph_at_new_pco2(ph0, 40, 60, model="rule_acute") == pytest.approx(7.250, abs=0.01)
    # Chronic: HCO3 31 -> pH 7.326; acute alkalosis 40 -> 30 (HCO3 22) -> 7.478.
    assert acidbase.ph_at_new_pco2(ph0, 40, 60, model="rule_chronic") == pytest.approx(7.326, abs=0.01)
    assert acidbase.ph_at_new_pco2(ph0, 40, 30, model="rule_acute") == pytest.approx(7.478, abs=0.01)


def test_invivo_curve_agrees_with_the_acute_rule():
    """The engine's constant-SBE in-vivo curve and the acute rule agree within 0.015 pH over 30-60 mmHg."""
    ph0 = acidbase.ph_henderson_hasselbalch(24, 40)
    for new in (30, 50, 60):
        a = acidbase.ph_at_new_pco2(ph0, 40, new, model="invivo_sbe")
        b = acidbase.ph_at_new_pco2(ph0, 40, new, model="rule_acute")
        assert abs(a - b) < 0.015
    assert acidbase.ph_at_new_pco2(7.33, 48, 48) == pytest.approx(7.33, abs=1e-9)


def test_unknown_model_names_are_refused():
    with pytest.raises(ValueError, match="model"):
        acidbase.ph_at_new_pco2(7.4, 40, 50, model="guess")
    with pytest.raises(ValueError, match="model"):
        oxygen.saturation(80, model="guess")


def test_severinghaus_temperature_correction():
    """Severinghaus 1979 Eq. 3: a sealed sample's PO2 rises ~6-7 %/degC when warmed (Bradley 1956: ~6 %/degC)."""
    p39 = oxygen.po2_temperature_correction_severinghaus(80.0, 39.0)
    per_degree = (p39 / 80.0) ** 0.5 - 1
    assert 0.055 < per_degree < 0.075
    assert oxygen.po2_temperature_correction_severinghaus(80.0, 37.0) == pytest.approx(80.0)


def test_bohr_coefficient_at_p50():
    """Severinghaus 1979 Eq. 4: about -1.2 ln/pH at P50 (fixed-acid Bohr coefficient)."""
    assert oxygen.bohr_coefficient_severinghaus(26.6) == pytest.approx(-1.2, abs=1e-9)


# --- round trips ---------------------------------------------------------------------

def test_round_trip_po2_saturation_po2():
    po2 = np.geomspace(0.5, 600, 400)
    for kw in ({}, {"ph": 7.2, "pco2": 60, "temperature": 38.5}, {"ph": 7.55, "pco2": 28, "temperature": 35}):
        back = oxygen.po2_from_saturation(oxygen.saturation(po2, **kw), **kw)
        assert np.max(np.abs(back / po2 - 1)) < 1e-6


def test_round_trip_henderson_hasselbalch():
    ph = np.linspace(6.9, 7.7, 30)
    pco2 = np.linspace(20, 90, 30)
    hco3 = acidbase.bicarbonate_henderson_hasselbalch(ph, pco2)
    assert np.allclose(acidbase.ph_henderson_hasselbalch(hco3, pco2), ph, atol=1e-12)
    assert np.allclose(acidbase.pco2_henderson_hasselbalch(ph, hco3), pco2, rtol=1e-12)


# --- properties (hypothesis) -----------------------------------------------------------

po2s = st.floats(1.0, 600.0)
phs = st.floats(6.9, 7.7)
pco2s = st.floats(15.0, 100.0)
temps = st.floats(33.0, 41.0)


@given(po2s, st.floats(0.1, 50.0), phs, pco2s, temps)
def test_saturation_increases_with_po2(p, dp, ph, pco2, t):
    assert oxygen.saturation(p + dp, ph, pco2, t) >= oxygen.saturation(p, ph, pco2, t)


@given(po2s, phs, pco2s, temps, st.floats(0.1, 3.0))
def test_saturation_falls_with_temperature(p, ph, pco2, t, dt):
    assert oxygen.saturation(p, ph, pco2, t + dt) <= oxygen.saturation(p, ph, pco2, t)


@given(po2s, phs, pco2s, temps, st.floats(0.01, 0.3))
def test_saturation_falls_with_falling_ph(p, ph, pco2, t, dph):
    assert oxygen.saturation(p, ph - dph, pco2, t) <= oxygen.saturation(p, ph, pco2, t)


@given(pco2s, st.floats(0.5, 30.0), st.floats(0.0, 1.0), st.floats(5.0, 20.0))
def test_co2_content_increases_with_pco2_and_haldane(pco2, dp, s, hb):
    hct = carbon_dioxide.hematocrit_from_hb(hb)
    ph1 = acidbase.ph_blood_buffer_line(pco2, s, hb)
    ph2 = acidbase.ph_blood_buffer_line(pco2 + dp, s, hb)
    c1 = carbon_dioxide.co2_content_kelman(pco2, ph1, s, hct)
    c2 = carbon_dioxide.co2_content_kelman(pco2 + dp, ph2, s, hct)
    assert c2 > c1
    # Haldane: at the same PCO2, less saturated blood holds more CO2.
    if s > 0.05:
        ph_red = acidbase.ph_blood_buffer_line(pco2, s - 0.05, hb)
        assert carbon_dioxide.co2_content_kelman(pco2, ph_red, s - 0.05, hct) > c1


# --- bad input -------------------------------------------------------------------------

@pytest.mark.parametrize("call,needle", [
    (lambda: oxygen.saturation(-5), "PO2"),
    (lambda: oxygen.saturation(float("nan")), "PO2"),
    (lambda: oxygen.po2_from_saturation(1.2), "saturation"),
    (lambda: oxygen.o2_content(100, 97, 15), "did you mean 0.97"),
    (lambda: carbon_dioxide.co2_content_kelman(40, 7.4, -0.1), "SO2"),
    (lambda: acidbase.bicarbonate_henderson_hasselbalch(7.4, 0), "PCO2"),
    (lambda: oxygen.virtual_po2_factor_kelman(9.0), "pH"),
])
def test_bad_input_names_the_parameter(call, needle):
    with pytest.raises(ValueError, match=needle):
        call()
