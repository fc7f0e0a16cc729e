"""Spontaneous breathing on pressure support and CPAP: the equation of motion with muscle pressure,
effort from bedside measurements, and the two bounds at another support level."""

import numpy as np
import pytest
from scipy.integrate import quad

from ventcast.physiology.mechanics.motion import pressure_control_volumes
from ventcast.physiology.mechanics.spontaneous import (PMUS_EXCESSIVE, RSBI_FAILURE, STEP_S, effort_from_occlusion,
                                                       effort_from_tidal_volume, pmus_waveform, rsbi,
                                                       supported_breath, support_bounds)


def test_a_passive_patient_on_pressure_support_is_pressure_control_with_flow_cycling():
    """Pmus 0: the breath is a square pressure wave ending when the flow, which decays as e^(-t/tau) from
    its peak, has fallen to 25 % of it: at tau ln 4 (single compartment, common practice). VT equals
    pressure control at that Ti (physiology.mechanics.motion.pressure_control_volumes)."""
    r, c_ml, ps, rr = 10.0, 50.0, 10.0, 15.0
    b = supported_breath(ps, 5.0, r, c_ml, 0.0, rr, 1.0)
    tau = r * c_ml / 1000.0
    assert float(b.ti_s) == pytest.approx(tau * np.log(4.0), abs=2 * STEP_S)
    vt_pc, _trapped = pressure_control_volumes(ps, c_ml / 1000.0, tau, float(b.ti_s), 60.0 / rr - float(b.ti_s))
    assert float(b.vt_ml) == pytest.approx(1000.0 * float(vt_pc), rel=0.01)
    assert float(b.ppeak) == 15.0 and bool(b.cycled)


def test_cpap_breath_matches_the_equation_of_motion_solved_by_quadrature():
    """CPAP (support 0), effort only: R dV/dt + V/C = Pmus(t) from a relaxed lung has the solution
    V(t) = (1/R) integral_0^t e^(-(t-s)/tau) Pmus(s) ds. Worked example, computed independently by
    quadrature: R 5 cmH2O/L/s, C 50 mL/cmH2O, peak Pmus 8 cmH2O over 1.0 s, rate 12/min (the lung
    empties between breaths). VT (the volume's peak) within 1 %."""
    r, c, pmus, tin, ttot = 5.0, 0.05, 8.0, 1.0, 5.0
    tau = r * c

    def volume(t):
        return quad(lambda s: np.exp(-(t - s) / tau) * pmus_waveform(s, pmus, tin, ttot) / r, 0.0, t,
                    points=[tin] if t > tin else None, limit=200)[0]

    vt_quad = 1000.0 * max(volume(t) for t in np.linspace(0.5, 2.0, 151))
    b = supported_breath(0.0, 5.0, r, 1000.0 * c, pmus, 60.0 / ttot, tin)
    assert float(b.vt_ml) == pytest.approx(vt_quad, rel=0.01)
    assert 250.0 < vt_quad < 1000.0 * c * pmus  # lags the quasi-static C x Pmus = 400 mL


def test_pmus_and_dynamic_transpulmonary_pressure_from_the_occlusion_swing():
    """Bertoni et al. 2019 (Crit Care 23:346; coefficients from memory): Pmus = -3/4 dPocc;
    dPL,dyn = (Ppeak - PEEP) - 2/3 dPocc. dPocc -12 cmH2O on PS 12 / PEEP 8: Pmus 9, dPL,dyn 20 (above
    the 15 cmH2O the paper calls excessive)."""
    e = effort_from_occlusion(-12.0, ppeak=20.0, peep=8.0)
    assert e["pmus_cmh2o"] == pytest.approx(9.0)
    assert e["dpl_dyn_cmh2o"] == pytest.approx(20.0)
    assert "Bertoni" in e["basis"]
    assert effort_from_occlusion(-16.0)["pmus_cmh2o"] > PMUS_EXCESSIVE
    with pytest.raises(ValueError, match=r"delta_pocc_cmh2o = 3 cmH2O .*-60 to 0"):
        effort_from_occlusion(3.0)


def test_rsbi_threshold_of_yang_and_tobin():
    """Yang & Tobin 1991: f/VT above 105 breaths/min/L predicts a failed trial. 35/min at 300 mL: 117."""
    assert RSBI_FAILURE == 105.0
    assert float(rsbi(35, 300)) == pytest.approx(116.7, abs=0.1)
    assert float(rsbi(20, 500)) < RSBI_FAILURE < float(rsbi(35, 300))


def test_effort_from_the_measured_tidal_volume_inverts_the_breath():
    """Round trip: the VT of an effort of 6 cmH2O on PS 8 gives back 6 cmH2O (interpolated, within 0.1);
    a VT the support alone exceeds gives 0 and says so; an impossible VT is refused with its range."""
    vt = float(supported_breath(8.0, 5.0, 12.0, 45.0, 6.0, 22.0, 0.9).vt_ml)
    e = effort_from_tidal_volume(vt, 8.0, 5.0, 12.0, 45.0, 22.0, 0.9)
    assert e["pmus_cmh2o"] == pytest.approx(6.0, abs=0.1)
    low = effort_from_tidal_volume(0.5 * e["vt_passive_ml"], 8.0, 5.0, 12.0, 45.0, 22.0, 0.9)
    assert low["pmus_cmh2o"] == 0.0 and "support alone" in low["basis"]
    with pytest.raises(ValueError, match="measured VT = 1900 mL is outside"):
        effort_from_tidal_volume(1900.0, 8.0, 5.0, 12.0, 45.0, 22.0, 0.9)


def test_less_support_lowers_vt_at_unchanged_effort_and_raises_the_rate_at_preserved_drive():
    """PS 10 -> 6 (PEEP 5, R 10, C 55, Pmus 5 at 20/min): effort unchanged, VT and alveolar ventilation
    fall; drive preserved, the alveolar ventilation of now is kept by a higher rate at a smaller VT (rapid
    shallow breathing: RSBI rises); more support does the reverse."""
    b = support_bounds(10.0, 6.0, 5.0, 10.0, 55.0, 5.0, 20.0, 1.0, 150.0)
    now, same, kept = b["now"], b["effort_unchanged"], b["drive_preserved"]
    assert float(same["breath"].vt_ml) < float(now["breath"].vt_ml) - 50
    assert same["alveolar_ventilation"] < now["alveolar_ventilation"]
    assert kept["attainable"] and kept["rr"] > now["rr"] + 2
    assert kept["alveolar_ventilation"] == pytest.approx(now["alveolar_ventilation"], rel=0.03)
    assert float(kept["breath"].vt_ml) < float(now["breath"].vt_ml)
    assert float(kept["breath"].rsbi) > float(now["breath"].rsbi)
    more = support_bounds(10.0, 14.0, 5.0, 10.0, 55.0, 5.0, 20.0, 1.0, 150.0)
    assert float(more["effort_unchanged"]["breath"].vt_ml) > float(now["breath"].vt_ml)
    assert more["drive_preserved"]["rr"] < now["rr"]


def test_spontaneous_inputs_are_refused_with_their_ranges():
    with pytest.raises(ValueError, match=r"pressure support.*accepted range 0 to 40"):
        supported_breath(45.0, 5.0, 10.0, 50.0, 5.0, 20.0, 1.0)
    with pytest.raises(ValueError, match="neural inspiratory time = 3 s is outside"):
        supported_breath(8.0, 5.0, 10.0, 50.0, 5.0, 30.0, 3.0)
    with pytest.raises(ValueError, match=r"cycle_off_fraction"):
        supported_breath(8.0, 5.0, 10.0, 50.0, 5.0, 20.0, 1.0, cycle_off_fraction=0.95)


# --- step-down of pressure support --------------------------------------------------------------------

def _supported_patient(c_max, resistance, shunt=0.05):
    from ventcast.physiology.forecast import PatientModel
    from ventcast.physiology.mechanics.ventilator import Mechanics
    return PatientModel(pbw_kg=70, shunt_fixed=shunt, log_sd=0.6, dead_space_fraction=0.15, hb=12, vco2=200.0,
                        mechanics=Mechanics(resistance=resistance, c_max=c_max, anatomic_dead_space_ml=120.0))


def test_support_step_down_reaches_the_trial_with_both_bounds_and_names_every_broken_rule():
    """A patient breathing 520 mL at 18/min on PS 12 (compliance 45 mL/cmH2O; effort estimated from that
    VT): support falls 12 -> 10 -> 8, the trial conditions (PS <= 8 on PEEP 5; MacIntyre 2001, Boles
    2007). Each step has
    both bounds; effort unchanged loses alveolar ventilation, so its PaCO2 rises step by step; drive
    preserved keeps the alveolar ventilation of now, so its PaCO2 stays within 3 mmHg of now's. Every
    bound lists exactly the stop rules its own numbers break (checked here independently)."""
    from ventcast.physiology.planning.support import PH_MIN, RATE_MAX, TRIAL_SUPPORT_MAX, support_step_down

    model = _supported_patient(c_max=45, resistance=10)
    pmus = effort_from_tidal_volume(520, 12, 5, 10, 45, 18, 1.0)["pmus_cmh2o"]
    assert pmus > 1.0
    plan = support_step_down(model, 0.35, 5, 12, pmus, 18, 1.0, 10, 45, spo2_goal=0.9)
    assert [s.pressure_support for s in plan["steps"]] == [10.0, 8.0] and 8.0 <= TRIAL_SUPPORT_MAX
    assert plan["reached_trial_conditions"] and plan["stopped_because"] is None
    now = plan["now"]
    assert now["vt_ml"] == pytest.approx(520, abs=3)
    same = [s.bounds["effort_unchanged"]["paco2"] for s in plan["steps"]]
    assert now["paco2"] + 3 < same[0] < same[1] - 3
    for s in plan["steps"]:
        kept = s.bounds["drive_preserved"]
        assert abs(kept["paco2"] - now["paco2"]) < 3.0
        for b in s.bounds.values():
            expected = [w for w, bad in (("rate", b["rr_per_min"] > RATE_MAX), ("RSBI", b["rsbi"] > RSBI_FAILURE),
                                         ("SaO2", not b["sao2"] >= 0.9), ("pH", not b["ph"] >= PH_MIN),
                                         ("Pmus", b["pmus_cmh2o"] > PMUS_EXCESSIVE)) if bad]
            assert [w.split()[0] for w in b["breaks"]] == expected


def test_support_step_down_stops_at_the_step_that_would_break_a_rule_and_says_which():
    """A stiff lung (compliance 28 mL/cmH2O) breathing 26/min at 380 mL on PS 16: lowering support soon
    makes even the drive-preserved bound breathe rapidly and shallowly; the plan lists that step with the
    rules named and ends there (Yang & Tobin 1991: RSBI above 105). Earlier steps may break a rule in the
    effort-unchanged bound only: they are proposed, and say so."""
    from ventcast.physiology.planning.support import support_step_down

    model = _supported_patient(c_max=28, resistance=14, shunt=0.08)
    pmus = effort_from_tidal_volume(380, 16, 5, 14, 28, 26, 0.8)["pmus_cmh2o"]
    plan = support_step_down(model, 0.4, 5, 16, pmus, 26, 0.8, 14, 28)
    assert not plan["reached_trial_conditions"]
    last = plan["steps"][-1]
    assert last.bounds["drive_preserved"]["breaks"]
    assert plan["stopped_because"].startswith(f"at pressure support {last.pressure_support:g} cmH2O, even with the "
                                              f"drive preserved")
    assert all(w in plan["stopped_because"] for w in last.bounds["drive_preserved"]["breaks"])
    assert all(not s.bounds["drive_preserved"]["breaks"] for s in plan["steps"][:-1])


def test_support_matching_the_current_tidal_volume():
    """The first pressure-support level for a patient leaving controlled ventilation gives the VT they
    have now with their effort (round trip through the breath model, within 0.3 cmH2O)."""
    from ventcast.physiology.planning.support import support_matching_vt

    vt = float(supported_breath(11.0, 5.0, 10.0, 55.0, 4.0, 20.0, 1.0).vt_ml)
    assert support_matching_vt(vt, 5.0, 10.0, 55.0, 4.0, 20.0, 1.0) == pytest.approx(11.0, abs=0.3)
    with pytest.raises(ValueError, match="outside what pressure support 0 to 40 cmH2O gives"):
        support_matching_vt(3000.0, 5.0, 10.0, 55.0, 4.0, 20.0, 1.0)


def test_breaths_that_never_repeat_are_flagged_and_averaged(monkeypatch):
    """A time constant near the breath's length with weak effort gives alternating breaths (no periodic
    breath): flagged, and the mean of the last breaths, which holds within 3 % when four times as many breaths
    are simulated (a convergence check, ours). An ordinary breath is periodic and stops early."""
    from ventcast.physiology.mechanics import spontaneous as sp
    irregular = dict(pressure_support=16.9, peep=5, resistance=21.4, compliance_ml=77.7, pmus=1.16, rr=30.13,
                     ti_neural=0.8)
    first = sp.supported_breath(**irregular)
    assert not bool(first.periodic)
    monkeypatch.setattr(sp, "BREATHS", 120)
    monkeypatch.setattr(sp, "AVERAGED", 60)
    longer = sp.supported_breath(**irregular)
    assert float(first.vt_ml) == pytest.approx(float(longer.vt_ml), rel=0.03)
    ordinary = sp.supported_breath(10.0, 5.0, 10.0, 50.0, 5.0, 20.0, 1.0)
    assert bool(ordinary.periodic)
    monkeypatch.setattr(sp, "SETTLED_L", -1.0)  # never settled: all 120 breaths
    forced = sp.supported_breath(10.0, 5.0, 10.0, 50.0, 5.0, 20.0, 1.0)
    assert float(forced.vt_ml) == pytest.approx(float(ordinary.vt_ml), abs=0.2)
