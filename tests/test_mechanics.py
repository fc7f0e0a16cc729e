"""Ventilator and lung mechanics against worked examples, published tables and expected behaviour."""

import warnings

import numpy as np
from scipy.integrate import trapezoid
import pytest
from hypothesis import given, settings as hsettings, strategies as st

from ventcast.physiology import protocols
from ventcast.physiology.forecast import PatientModel, predict
from ventcast.physiology.mechanics import motion, recruitment
from ventcast.physiology.mechanics.ventilator import Mechanics, Settings, breathe


# --- worked examples (digest section 5; equations from the cited papers) -------------------------

def test_intrinsic_peep_worked_example():
    """Row 28: passive single compartment (Pepe & Marini 1982, from memory): R 15, C 50 mL/cmH2O,
    VT 0.5 L, Te 1.2 s -> trapped 126 mL, intrinsic PEEP 2.53 cmH2O; Te 2.0 s -> 37 mL, 0.75."""
    assert motion.intrinsic_peep(0.5, 15, 0.05, 1.2) == pytest.approx(2.53, abs=0.01)
    assert 1000 * motion.trapped_volume_volume_control(0.5, 0.75, 1.2) == pytest.approx(126, abs=1)
    assert motion.intrinsic_peep(0.5, 15, 0.05, 2.0) == pytest.approx(0.75, abs=0.01)


def test_mean_airway_pressure_worked_example():
    """Row 29: PIP 25, PEEP 10, Ti 1 s, RR 20: pressure control 15.0, volume control 12.5 cmH2O."""
    assert motion.mean_airway_pressure("pressure", 25, 10, 1.0, 20) == pytest.approx(15.0)
    assert motion.mean_airway_pressure("volume", 25, 10, 1.0, 20) == pytest.approx(12.5)


def test_mechanical_power_worked_example():
    """Row 24: Gattinoni 2016: RR 20, VT 0.5 L, Ppeak 30, Pplat 25, PEEP 10, I:E 1:2 ->
    full = simplified = 22.05 J/min; second example (simplified) 30.87 J/min."""
    assert motion.mechanical_power_gattinoni(20, 0.5, 30, 10, 0.5, 10) == pytest.approx(22.05, abs=0.01)
    assert motion.mechanical_power_simplified(20, 0.5, 30, 25, 10) == pytest.approx(22.05, abs=0.01)
    assert motion.mechanical_power_simplified(30, 0.42, 32, 28, 14) == pytest.approx(30.87, abs=0.01)


def test_giosa_surrogate():
    """Row 25: Giosa 2019: VE 10 L/min, Ppeak 30, PEEP 10, flow 30 L/min -> 22.5 J/min."""
    assert motion.mechanical_power_giosa(10, 30, 10, 30) == pytest.approx(22.5, abs=0.01)


def test_becher_pressure_control_power_without_ramp():
    """Becher 2019, simplified square-wave form: 0.098 RR VT (dPinsp + PEEP) (the full form's bracket -> 0
    as Tslope -> 0). Independent check: the energy of a breath is the integral of airway pressure over the
    delivered volume, and the airway pressure is PEEP + dPinsp throughout a square-wave inflation."""
    mp = motion.mechanical_power_pressure_control(20, 0.5, 15, 10, 0.5 / 15, 10)
    assert mp == pytest.approx(0.098 * 20 * 0.5 * (15 + 10))
    # A numerical integral of Paw dV over an exponential fill (tau = R C) gives the same energy.
    r, c, ti, dp, peep = 10.0, 0.03, 0.6, 15.0, 10.0
    t = np.linspace(0.0, ti, 20001)
    volume = c * dp * (1.0 - np.exp(-t / (r * c)))          # lung that does not fill within Ti
    energy = trapezoid(np.full_like(t, peep + dp), volume)    # [cmH2O L]
    assert motion.mechanical_power_pressure_control(16, volume[-1], dp, peep, c, r) == pytest.approx(
        0.098 * 16 * energy, rel=1e-6)
    # The ramp limits of the full form: a very short ramp tends to the square wave, a very slow one to 1/2.
    square = motion.mechanical_power_pressure_control(20, 0.45, 15, 10, 0.03, 10)
    short = motion.mechanical_power_pressure_control(20, 0.45, 15, 10, 0.03, 10, t_slope=1e-4)
    slow = motion.mechanical_power_pressure_control(20, 0.45, 15, 10, 0.03, 10, t_slope=1e4)
    assert short == pytest.approx(square, rel=1e-3)
    assert slow == pytest.approx(0.098 * 20 * (25 * 0.45 - 225 * 0.03 * 0.5), rel=1e-3)


def test_pressure_control_power_is_never_negative():
    """Issue 21 item 6: the copd-trapping demo in pressure control, Pinsp 35, RR 16, Ti 1.0, PEEP 0 gave
    -6.4 J/min; in random pressure-control settings no successful result may be negative."""
    from ventcast.app.casefile import load_demo
    from ventcast.app.engine import apply_sets, to_settings
    case = load_demo("copd-trapping")
    trial = to_settings(apply_sets(case, ["mode=pressure", "inspiratory_pressure_cmh2o=35", "rr_per_min=16",
                                          "inspiratory_time_s=1.0", "peep_cmh2o=0"]))
    obs = case["observations"][-1]
    crs = obs["vte_ml"] / (obs["pplat_cmh2o"] - case["settings"]["peep_cmh2o"])
    demo = breathe(trial, Mechanics(c_max=crs, resistance=20.0))
    assert demo.success and demo.mechanical_power > 0
    # Square wave: the energy is (PEEP + dPinsp) x the delivered VT (Becher 2019 simplified form).
    assert demo.mechanical_power == pytest.approx(0.098 * 16 * 35 * demo.vt_ml / 1000, rel=1e-6)
    rng = np.random.default_rng(7)
    n = 4000
    settings = Settings(mode="pressure", fio2=0.5, peep=rng.uniform(0, 20, n),
                        inspiratory_pressure=rng.uniform(5, 40, n), rr=rng.uniform(8, 35, n),
                        ti=rng.uniform(0.4, 1.2, n))
    mech = Mechanics(c_max=rng.uniform(15, 80, n), resistance=rng.uniform(5, 30, n))
    out = breathe(settings, mech)
    ok = np.asarray(out.success)
    assert ok.mean() > 0.5
    assert np.all(np.asarray(out.mechanical_power)[ok] >= 0)


@pytest.mark.parametrize("p,expected", [(5, 151.7), (15, 1000.0), (25, 1848.3)])
def test_venegas_curve(p, expected):
    """Row 30: Venegas 1998 sigmoid, a 0, b 2000 mL, c 15, d 4 cmH2O."""
    assert recruitment.venegas_volume(p, 0, 2000, 15, 4) == pytest.approx(expected, abs=0.1)


def test_venegas_compliance():
    """Venegas 1998: Cmax = b/(4d) = 125 mL/cmH2O at c; C(5) = 35.1 (digest 5.4)."""
    assert recruitment.venegas_compliance(15, 2000, 15, 4) == pytest.approx(125.0)
    assert recruitment.venegas_compliance(5, 2000, 15, 4) == pytest.approx(35.1, abs=0.1)


def test_aerated_curve_is_linear_then_venegas_and_invertible():
    p = np.linspace(0, 40, 81)
    v = recruitment.aerated_volume(p, 0.05, 20, 5)
    assert np.allclose(v[p <= 20], 0.05 * p[p <= 20])
    assert np.all(np.diff(v) > 0)
    assert np.allclose(recruitment.aerated_pressure(v, 0.05, 20, 5), p, atol=1e-9)
    assert recruitment.aerated_pressure(0.05 * 30 + 1.0, 0.05, 20, 5) == np.inf  # beyond capacity


# --- ARDS Network tables, row by row ------------------------------------------------------------

def test_lower_peep_table_exactly():
    """ARDS Network 2000, lower PEEP/higher FiO2, checked against two reproductions (data-exchange notes)."""
    published = [(0.3, 5), (0.4, 5), (0.4, 8), (0.5, 8), (0.5, 10), (0.6, 10), (0.7, 10), (0.7, 12),
                 (0.7, 14), (0.8, 14), (0.9, 14), (0.9, 16), (0.9, 18), (1.0, (18, 24))]
    assert list(protocols.PEEP_FIO2_LOWER) == published
    assert [p for f, p in protocols.table_steps("lower-peep") if f == 0.7] == [10, 12, 14]  # row 36


def test_higher_peep_table_exactly():
    """Brower 2004 (ALVEOLI), higher PEEP/lower FiO2; 16 (not 15) in the second FiO2-0.4 cell."""
    published = [(0.3, 5), (0.3, 8), (0.3, 10), (0.3, 12), (0.3, 14), (0.4, 14), (0.4, 16), (0.5, 16),
                 (0.5, 18), ((0.5, 0.8), 20), (0.8, 22), (0.9, 22), (1.0, 22), (1.0, 24)]
    assert list(protocols.PEEP_FIO2_HIGHER) == published
    with pytest.raises(ValueError, match="table"):
        protocols.table_steps("medium")


def test_protocol_goals():
    """ARDS Network 2000: plateau <= 30, pH 7.30-7.45, PaO2 55-80 or SpO2 88-95 %; Amato 2015 ceiling 15."""
    lim = protocols.LIMITS
    assert lim["pplat"].high == 30 and lim["ph"].low == 7.30 and lim["ph"].high == 7.45
    assert (lim["pao2"].low, lim["pao2"].high) == (55, 80) and (lim["spo2"].low, lim["spo2"].high) == (0.88, 0.95)
    assert lim["driving_pressure"].high == 15


# --- properties ---------------------------------------------------------------------------------

LINEAR = Mechanics(resistance=12, c_max=45, inflection=40, width=8)


@hsettings(max_examples=40, deadline=None)
@given(st.floats(5, 20), st.floats(250, 600), st.floats(20, 150))
def test_pplat_rises_with_vt_and_peep(peep, vt, dvt):
    s = Settings(mode="volume", peep=np.array([peep, peep, peep + 2]), vt_ml=np.array([vt, vt + dvt, vt]),
                 rr=18, ti=1.0)
    b = breathe(s, Mechanics(resistance=12, c_max=45, recruitable=0.2))
    assert b.success.all()
    assert b.pplat[1] > b.pplat[0] and b.pplat[2] > b.pplat[0]


def test_intrinsic_peep_rises_with_rate_at_fixed_ti():
    rr = np.array([10, 15, 20, 25, 30])
    b = breathe(Settings(mode="volume", peep=5, vt_ml=500, rr=rr, ti=1.0), Mechanics(resistance=25, c_max=60))
    assert np.all(np.diff(b.intrinsic_peep) > 0)


def test_pressure_control_vt_falls_when_ti_is_short():
    """Pressure control: VT falls once Ti is shortened below ~3 tau (single-compartment filling)."""
    mech = Mechanics(resistance=15, c_max=50)  # tau 0.75 s
    ti = np.array([3.0, 2.25, 1.5, 0.75, 0.4])
    b = breathe(Settings(mode="pressure", peep=5, inspiratory_pressure=12, rr=10, ti=ti), mech)
    assert b.vt_ml[0] == pytest.approx(b.vt_ml[1], rel=0.06)  # beyond 3 tau: nearly full
    assert np.all(np.diff(b.vt_ml) < 0)
    assert b.vt_ml[-1] < 0.5 * b.vt_ml[0]


def test_pressure_control_vt_from_compliance():
    b = breathe(Settings(mode="pressure", peep=5, inspiratory_pressure=10, rr=10, ti=2.5), LINEAR)
    assert b.vt_ml == pytest.approx(450, rel=0.02)  # C dP once filled
    assert b.ppeak == pytest.approx(15)


def test_volume_control_pressures_follow_the_equation_of_motion():
    b = breathe(Settings(mode="volume", peep=8, vt_ml=450, rr=12, ti=1.0), LINEAR)
    assert b.pplat == pytest.approx(8 + 450 / 45 + float(b.intrinsic_peep), abs=0.05)
    assert b.ppeak - b.pplat == pytest.approx(12 * 0.45 / 1.0, abs=1e-6)  # R x flow
    assert b.driving_pressure == pytest.approx(10.0, abs=0.05)
    assert b.alveolar_ventilation == pytest.approx(12 * (450 - 80) / 1000)


def test_recruitment_manoeuvre_keeps_lung_open_above_closing_pressure():
    """Hysteresis (Crotti 2001): after a 40 cmH2O manoeuvre the same PEEP keeps more lung open."""
    mech = Mechanics(resistance=12, c_max=35, recruitable=0.4)
    s = Settings(mode="volume", peep=10, vt_ml=400, rr=20, ti=0.9)
    before = breathe(s, mech)
    after = breathe(s, Mechanics(resistance=12, c_max=35, recruitable=0.4, pressure_history=40))
    assert after.open_fraction > before.open_fraction + 0.1
    assert after.compliance > before.compliance


def test_cardiac_output_falls_with_mean_airway_pressure():
    """Luecke & Pelosi 2005 (venous return): CO falls roughly 10-25 % from ZEEP to PEEP 15-20 (from memory)."""
    co = recruitment.cardiac_output_with_paw(5.0, np.array([6, 21]), 6)
    assert 0.75 <= co[1] / co[0] <= 0.90
    assert recruitment.cardiac_output_with_paw(5.0, 21, 6, preload_dependence=0) == pytest.approx(5.0)


# --- combined model -----------------------------------------------------------------------------

def _patient(recruitable, shunt_fixed):
    return PatientModel(pbw_kg=60, shunt_fixed=shunt_fixed, log_sd=0.9, dead_space_fraction=0.25, hb=11,
                        mechanics=Mechanics(resistance=14, c_max=35, recruitable=recruitable))


def _at_peep(patient, peep, fio2=0.6):
    return predict(patient, Settings(mode="volume", fio2=fio2, peep=np.asarray(peep, float), vt_ml=400, rr=20, ti=0.9))


def test_recruitable_lung_gains_from_peep():
    """Recruitable lung at PEEP 5 -> 15: shunt falls and PaO2 rises (Crotti 2001; Karbing 2020)."""
    p = _at_peep(_patient(0.35, 0.08), [5, 15])
    assert p.success.all()
    assert p.shunt[1] < p.shunt[0] - 0.1
    assert p.gas.pao2[1] > p.gas.pao2[0] + 30


def test_non_recruitable_lung_does_not():
    """Non-recruitable lung: the same step barely changes PaO2, raises Pplat by about 10 and lowers CO."""
    p = _at_peep(_patient(0.0, 0.30), [5, 15])
    assert p.success.all()
    assert abs(p.gas.pao2[1] - p.gas.pao2[0]) < 8
    assert p.breathing.pplat[1] - p.breathing.pplat[0] == pytest.approx(10, abs=1.5)
    assert p.cardiac_output[1] < p.cardiac_output[0]


def test_peep_above_the_upper_inflection_raises_dead_space():
    """Overdistension: above the upper inflection more PEEP raises VD/VT."""
    p = _at_peep(_patient(0.1, 0.1), [16, 20, 24])
    assert p.success.all()
    assert p.breathing.pplat[0] > 26  # beyond the default inflection
    assert np.all(np.diff(p.gas.vd_vt) > 0)


def test_batched_prediction_equals_single():
    pt = _patient(0.3, 0.1)
    batch = _at_peep(pt, [6, 12])
    one = _at_peep(pt, 12.0)
    assert batch.gas.pao2[1] == pytest.approx(float(one.gas.pao2), abs=1e-6)


# --- bad input ----------------------------------------------------------------------------------

@pytest.mark.parametrize("kw,needle", [
    ({"ti": 3.5, "rr": 20}, "Ti = 3.5 s leaves no time to breathe out"),
    ({"rr": 0}, "RR = 0"), ({"rr": 61}, "RR = 61"),
    ({"vt_ml": 80}, "VT = 80"), ({"vt_ml": 1300}, "mL/kg PBW"),
    ({"peep": -1}, "PEEP = -1"), ({"peep": 31}, "PEEP = 31"),
    ({"fio2": 1.5}, "FiO2 = 1.5"), ({"fio2": 0.1}, "FiO2 = 0.1"), ({"fio2": 40}, "did you mean 0.40"),
    ({"mode": "pressure", "inspiratory_pressure": 55}, "inspiratory pressure = 55"),
    ({"mode": "oscillate"}, "mode"),
])
def test_bad_settings(kw, needle):
    s = {"mode": "volume", "fio2": 0.5, "peep": 5, "vt_ml": 420, "rr": 20, "ti": 1.0, **kw}
    if s["mode"] == "pressure":
        s.setdefault("inspiratory_pressure", 12)
    with pytest.raises(ValueError, match=needle):
        breathe(Settings(**s), Mechanics(), pbw_kg=60)


def test_volume_beyond_capacity_fails_honestly():
    b = breathe(Settings(mode="volume", peep=25, vt_ml=1500, rr=10, ti=1.0), Mechanics(c_max=20, inflection=15, width=3))
    assert not b.success and "does not fit" in b.message and np.isnan(b.pplat)


def test_pressure_control_that_does_not_fill_says_so():
    """Issue 21 item 6: a square pressure wave fills a single compartment as 1 - exp(-Ti/tau)
    (equation of motion); with Ti of one time constant (63 %) the Limits say the lung does not fill."""
    from ventcast.app.engine import limit_checks
    slow = breathe(Settings(mode="pressure", fio2=0.5, peep=5, inspiratory_pressure=15, rr=20, ti=0.6),
                   Mechanics(c_max=40.0, resistance=25.0))
    assert slow.success
    tau = float(slow.tau)
    assert float(slow.inspiratory_filling) == pytest.approx(1 - np.exp(-0.6 / tau), rel=1e-9)
    assert float(slow.inspiratory_filling) < 0.95
    full = breathe(Settings(mode="pressure", fio2=0.5, peep=5, inspiratory_pressure=15, rr=12, ti=2.0),
                   Mechanics(c_max=40.0, resistance=5.0))
    assert float(full.inspiratory_filling) > 0.99
    volume = breathe(Settings(mode="volume", fio2=0.5, peep=5, vt_ml=450, rr=20, ti=0.8), Mechanics())
    assert float(volume.inspiratory_filling) == 1.0
    steady = {"pplat_cmh2o": 20.0, "driving_pressure_cmh2o": 15.0, "vt_ml_per_kg_pbw": 6.0, "ph": 7.4,
              "pao2_mmhg": 80.0, "sao2": 0.95, "paco2_mmhg": 40.0, "intrinsic_peep_cmh2o": 0.0,
              "mechanical_power_j_min": 10.0, "inspiratory_filling": float(slow.inspiratory_filling)}
    codes = [line["code"] for line in limit_checks(steady)]
    assert "pc_incomplete_filling" in codes
    steady["inspiratory_filling"] = 0.99
    assert "pc_incomplete_filling" not in [line["code"] for line in limit_checks(steady)]


def test_flow_limited_lungs_follow_the_waterfall_of_external_peep():
    """Tobin & Lodato 1989 (Chest 96:449) and Ranieri et al. 1993 (Am Rev Respir Dis 147:5; critical
    external PEEP about 85 % of intrinsic PEEP), both from memory: in flow-limited lungs external PEEP
    below about 80 % of intrinsic PEEP barely raises total PEEP or plateau pressure; above it, total PEEP
    follows external PEEP. Without flow limitation the pressures add."""
    s = dict(mode="volume", fio2=0.35, vt_ml=480, rr=22, ti=1.0)
    limited = Mechanics(resistance=35, c_max=55, flow_limitation=1.0)
    free = Mechanics(resistance=35, c_max=55, flow_limitation=0.0)
    zeep = breathe(Settings(peep=0, **s), limited)
    pi0 = float(zeep.intrinsic_peep)
    assert pi0 > 4.0
    below = breathe(Settings(peep=round(0.6 * pi0, 1), **s), limited)
    assert float(below.peep_total) - pi0 < 0.5
    assert float(below.pplat) - float(zeep.pplat) < 0.6
    above = breathe(Settings(peep=pi0 + 6.0, **s), limited)
    assert float(above.peep_total) == pytest.approx(pi0 + 6.0, abs=0.6 + 0.2 * pi0)
    added = breathe(Settings(peep=round(0.6 * pi0, 1), **s), free)
    assert float(added.peep_total) == pytest.approx(pi0 + round(0.6 * pi0, 1), abs=0.3)


def test_waterfall_formula_limits():
    """Independent calculation of the waterfall's two limits: flow-limited total PEEP is PEEPi0 well
    below the critical external PEEP and PEEPe + 0.2 PEEPi0 well above it; not flow-limited, the sum."""
    from ventcast.physiology.mechanics.ventilator import waterfall_total_peep
    assert float(waterfall_total_peep(0.0, 10.0)) == pytest.approx(10.0, abs=1e-3)
    assert float(waterfall_total_peep(20.0, 10.0)) == pytest.approx(22.0, abs=1e-3)
    assert float(waterfall_total_peep(5.0, 10.0, 0.0)) == pytest.approx(15.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a trapped volume beyond capacity stays infinite, without warnings
        assert np.all(np.isinf(waterfall_total_peep(np.array([5.0, 5.0]), np.inf, np.array([1.0, 0.0]))))


def test_compiled_breath_helpers_equal_the_array_forms():
    """The breathing loop's compiled one-case forms (physiology/mechanics/_breath.py) of the pressure-volume
    curve, the opening and closing of recruitable lung (normal distribution function), the waterfall and the
    square-wave pressure-control breath give the array forms' numbers over their domain. Numba's cache does
    not see a change of the waterfall constants it froze in: a stale cache fails here too."""
    from scipy.special import ndtr

    from ventcast.physiology.mechanics import _breath as k
    from ventcast.physiology.mechanics.motion import pressure_control_volumes
    from ventcast.physiology.mechanics.recruitment import aerated_pressure, aerated_volume
    from ventcast.physiology.mechanics.ventilator import waterfall_total_peep

    rng = np.random.default_rng(41)
    n = 400
    p, c, infl, width = rng.uniform(0, 60, n), rng.uniform(0.01, 0.1, n), rng.uniform(8, 45, n), rng.uniform(1, 20, n)
    v = aerated_volume(p, c, infl, width) * rng.uniform(0.5, 1.2, n)
    x = rng.uniform(-8, 8, n)
    peep, pi0, fl = rng.uniform(0, 30, n), rng.uniform(0, 20, n), rng.choice([0.0, 0.3, 1.0], n)
    for i in range(n):
        assert k.aerated_volume(p[i], c[i], infl[i], width[i]) == pytest.approx(float(aerated_volume(p[i], c[i], infl[i], width[i])), rel=1e-12)
        assert k.aerated_pressure(v[i], c[i], infl[i], width[i]) == pytest.approx(float(aerated_pressure(v[i], c[i], infl[i], width[i])), rel=1e-12)
        assert k.ndtr(x[i]) == pytest.approx(float(ndtr(x[i])), rel=1e-12, abs=1e-15)
        assert k.waterfall_total_peep(peep[i], pi0[i], fl[i]) == pytest.approx(float(waterfall_total_peep(peep[i], pi0[i], fl[i])), rel=1e-12)
    # The pressure-control breath inside one cycle, against motion.pressure_control_volumes (lung fully open,
    # linear part of the curve: chord compliance = Cmax).
    for dpi, r, cmax, ti, te in ((15.0, 10.0, 0.05, 1.0, 2.0), (25.0, 25.0, 0.03, 0.8, 1.0), (8.0, 5.0, 0.08, 1.2, 3.8)):
        row = np.array([0.0, dpi, 0.0, ti, te, ti / (ti + te), r, cmax, 45.0, 5.0, 0.0, 0.0, 20.0, 5.0, 5.0, 3.0, 0.0])
        g = k._cycle(1.0, cmax, False, row)
        vt, trapped = pressure_control_volumes(dpi, cmax, r * cmax, ti, te)
        assert g[3] == pytest.approx(float(vt), rel=1e-12) and g[4] == pytest.approx(float(trapped), rel=1e-12)


def test_compiled_breathing_loop_divides_as_numpy_does():
    """The breathing loop replaced array code that let a division by zero become inf and caught it with
    its finiteness checks; compiled, it must do the same, never raise. A zero SD of the opening pressures
    (a step function, ndtr of +/-inf) gives the answer of a vanishingly small SD."""
    from ventcast.physiology.mechanics._breath import settle

    def run(sd_open):
        row = np.array([[0.45, 0.0, 8.0, 1.0, 2.0, 1 / 3, 12.0, 0.05, 26.0, 4.0, 0.2, 0.0, 20.0, sd_open, 10.0, 5.0,
                         0.0]])
        out = np.empty((1, 8))
        settle(True, row, 1e-10, 60, out)
        return out[0]

    step, narrow = run(0.0), run(1e-12)
    assert step[7] == 1.0  # converged
    np.testing.assert_allclose(step, narrow, rtol=1e-9, atol=1e-12)
