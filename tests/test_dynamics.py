"""The time-course model against published time courses, conservation and the steady-state engine."""

import numpy as np
import pytest
from scipy.optimize import curve_fit

from ventcast.physiology.dynamics.course import Change, rhs, simulate
from ventcast.physiology.forecast import PatientModel
from ventcast.physiology.mechanics.ventilator import Mechanics, Settings

# A patient without airflow obstruction, P/F above 180, in pressure control (as in Cakar 2001).
PATIENT = PatientModel(pbw_kg=70, shunt_fixed=0.08, log_sd=0.6, dead_space_fraction=0.15, hb=12,
                       mechanics=Mechanics(resistance=10, c_max=50))


def pc(**kw):
    base = dict(mode="pressure", fio2=0.35, peep=6, inspiratory_pressure=10, rr=12, ti=1.0)
    base.update(kw)
    return Settings(**base)


def _rate_constant(course):
    start, end = course.pao2[0], course.pao2[-1]

    def model(t, k):
        return start + (end - start) * (1 - np.exp(-k * t))

    (k,), _ = curve_fit(model, course.minutes, course.pao2, p0=[1.0])
    return k


#: Cakar et al. 2001 (Intensive Care Med 27:655, abstract): blood gases 3, 5, 7, 9, 11, 15, 20, 25 and
#: 30 min after each step; the 30-min value taken as the new equilibrium; k fitted to
#: PaO2b + (PaO2end - PaO2b)(1 - e^(-kt)). Rise k = 1.01 +/- 0.71 /min, fall k = 0.69 +/- 0.42 /min.
CAKAR_SAMPLES_MIN = np.array([3, 5, 7, 9, 11, 15, 20, 25, 30.0])
CAKAR_RISE = (1.01 - 0.71, 1.01 + 0.71)
CAKAR_FALL = (0.69 - 0.42, 0.69 + 0.42)
#: Non-COPD patients with P/F >= 180 at FiO2 0.35 (Cakar's inclusion), PCV, RR 12, VT ~10 mL/kg PBW,
#: PEEP 5 (Cakar 1998 conference report).
CAKAR_PATIENTS = [dict(shunt_fixed=0.08, log_sd=0.6), dict(shunt_fixed=0.15, log_sd=0.8),
                  dict(shunt_fixed=0.04, log_sd=0.5)]


def _cakar_k(course):
    """k fitted as Cakar et al. 2001 did: from the sampled PaO2 values with the 30-min value as the end."""
    y = np.interp(CAKAR_SAMPLES_MIN, course.minutes, course.pao2)
    y0, y_end = course.pao2[0], y[-1]
    (k,), _ = curve_fit(lambda t, k: y0 + (y_end - y0) * (1 - np.exp(-k * t)), np.r_[0.0, CAKAR_SAMPLES_MIN],
                        np.r_[y0, y], p0=[1.0], bounds=(0.01, 20.0))
    return k


def _cakar_steps(patient):
    def s(fio2):
        return Settings(mode="pressure", fio2=fio2, peep=5, inspiratory_pressure=14, rr=12, ti=1.2)
    up = simulate(patient, s(0.35), s(0.55), minutes=30, step_s=5)
    down = simulate(patient, s(0.55), s(0.35), minutes=30, step_s=5)
    assert up.success and down.success
    assert up.pao2[0] / 0.35 >= 180
    return up, down


def _cakar_patient(**kw):
    return PatientModel(pbw_kg=70, dead_space_fraction=0.15, hb=12, mechanics=Mechanics(resistance=10, c_max=50), **kw)


@pytest.mark.parametrize("kw", CAKAR_PATIENTS)
def test_fio2_rise_rate_constant_matches_cakar_2001(kw):
    """Cakar et al. 2001: after FiO2 0.35 -> 0.55, k = 1.01 +/- 0.71 /min (mean +/- SD), fitted on their
    sampling times; 90 % of the change within 10 min (Cakar 1998: "10 min adequate")."""
    up, down = _cakar_steps(_cakar_patient(**kw))
    assert CAKAR_RISE[0] <= _cakar_k(up) <= CAKAR_RISE[1]
    assert up.t90_pao2 < 10.0 and down.t90_pao2 < 10.0
    assert up.pao2[-1] > up.pao2[0] + 30


@pytest.mark.xfail(strict=True, reason=(
    "known divergence from Cakar et al. 2001: the model's fall is faster (k 1.45-1.7 /min for these "
    "patients, published 0.69 +/- 0.42) and faster than its rise (published: slower). Its PaO2 settles "
    "within about 3 min either way, while patients took minutes longer (t90 4.2 +/- 4.1 and 5.5 +/- 4 min, "
    "Cakar 2001; time to the final value 9 +/- 7.3 min rising and 7.1 +/- 6.0 falling in the same group's "
    "1998 report, Crit Care 2:P088, where the rise was the slower). A wider spread of specific ventilation "
    "barely slows it (k 1.3-1.5 at SD 1.2): the slow process patients show is missing. Nor is it the "
    "sampling: with each sample's PaO2 given a 5 % error (Thorson 1983, Chest 84:14: CV 5.1 +/- 3.2 % in "
    "stable ICU patients), k fitted as Cakar did from an exponential of k 1.6 averages about 4 /min, not less "
    "(ours, 2,000 simulated patients; its median stays 1.6). The step-down plan holds at least 10 min "
    "(HOLD_FLOOR_MIN) because of it"))
@pytest.mark.parametrize("kw", CAKAR_PATIENTS)
def test_fio2_fall_rate_constant_matches_cakar_2001(kw):
    """Cakar et al. 2001: after FiO2 0.55 -> 0.35, k = 0.69 +/- 0.42 /min, and the fall is not faster
    than the rise."""
    up, down = _cakar_steps(_cakar_patient(**kw))
    assert CAKAR_FALL[0] <= _cakar_k(down) <= CAKAR_FALL[1]
    assert _cakar_k(down) <= _cakar_k(up)


def test_obstructive_lungs_wash_in_and_out_more_slowly():
    """Slow units: lungs with low-V/Q units, high resistance and a wide spread of specific ventilation
    (multiple-breath washout in obstructive disease, common practice) settle more slowly in both
    directions than the non-COPD patients of Cakar et al. 2001."""
    typical_up, typical_down = _cakar_steps(_cakar_patient(**CAKAR_PATIENTS[0]))
    obstructive = PatientModel(pbw_kg=70, shunt_fixed=0.03, log_sd=1.3, dead_space_fraction=0.3, hb=12,
                               specific_ventilation_sd=1.0, mechanics=Mechanics(resistance=25, c_max=60))
    up, down = _cakar_steps(obstructive)
    assert _cakar_k(up) < 0.7 * _cakar_k(typical_up)
    assert _cakar_k(down) < 0.8 * _cakar_k(typical_down)
    assert up.t90_pao2 > typical_up.t90_pao2 and down.t90_pao2 > typical_down.t90_pao2


def test_specific_ventilation_spread_slows_the_tail_only():
    """Independent calculation: with every unit turning over at V_lung / VA the course is one family of
    exponentials; spreading specific ventilation (same volume, same ventilation) keeps the end point
    (the steady state does not depend on gas volumes) and lengthens the 90 % time."""
    even = simulate(_cakar_patient(shunt_fixed=0.08, log_sd=0.6, specific_ventilation_sd=0.0),
                    Settings(mode="pressure", fio2=0.35, peep=5, inspiratory_pressure=14, rr=12, ti=1.2),
                    Settings(mode="pressure", fio2=0.55, peep=5, inspiratory_pressure=14, rr=12, ti=1.2))
    spread = simulate(_cakar_patient(shunt_fixed=0.08, log_sd=0.6, specific_ventilation_sd=1.2),
                      Settings(mode="pressure", fio2=0.35, peep=5, inspiratory_pressure=14, rr=12, ti=1.2),
                      Settings(mode="pressure", fio2=0.55, peep=5, inspiratory_pressure=14, rr=12, ti=1.2))
    assert abs(even.pao2[-1] - spread.pao2[-1]) < 0.5
    assert spread.t90_pao2 > 1.1 * even.t90_pao2


def _fraction_of_change(course):
    end = float(course.final.gas.paco2)
    return (course.paco2 - course.paco2[0]) / (end - course.paco2[0])


def test_minute_ventilation_step():
    """Minute-ventilation step (RR 12 -> 18): most of the PaCO2 change within 10 min and more than 90 %
    by 30 min (from memory; Farhi & Rahn 1955 abstract: CO2 stores change 50 % in about 4 min)."""
    c = simulate(PATIENT, pc(rr=12), pc(rr=18))
    f = _fraction_of_change(c)
    at = {m: f[np.argmin(np.abs(c.minutes - m))] for m in (4, 10, 30)}
    assert at[10] > 0.5
    assert at[30] > 0.9
    assert 0.3 < at[4] < 0.75


def test_rising_paco2_is_slower_than_falling():
    """Direction of the asymmetry: after a ventilation decrease (PaCO2 rising) the approach is slower than
    after an increase. Taskar et al. 1995 (ICU patients after +/-10 % ventilator resetting): the time
    constant is longer after a ventilation decrease; mechanical hyperventilation study (J Appl Physiol
    1962;17:805, abstract): only a third of the CO2 lost in 12 min was regained in the next 12 min.
    (Farhi & Rahn 1955's abstract states no direction.)"""
    falling = simulate(PATIENT, pc(rr=12), pc(rr=18))
    rising = simulate(PATIENT, pc(rr=18), pc(rr=12))
    assert rising.t90_paco2 > falling.t90_paco2
    i10 = np.argmin(np.abs(falling.minutes - 10))
    assert _fraction_of_change(rising)[i10] < _fraction_of_change(falling)[i10]


def test_apnoea():
    """Apnoea from an oxygenated steady state (FiO2 1.0, airway open): PaCO2 rises most in the first
    minute, then 3-6 mmHg/min (Stock et al. 1988: 7 mmHg in 10 s, then 6 mmHg/min, awake; Eger &
    Severinghaus 1961: ~3 mmHg/min anaesthetised, from memory)."""
    c = simulate(PATIENT, pc(fio2=1.0), Change(0.0, apnoea=True), minutes=6)
    assert c.success
    t, p = c.minutes, c.paco2
    first = p[np.argmin(np.abs(t - 1))] - p[0]
    later = (p[np.argmin(np.abs(t - 5))] - p[np.argmin(np.abs(t - 2))]) / 3.0
    assert first > later
    assert 3.0 <= later <= 6.0
    assert np.all(c.pao2 > 100)  # apnoeic oxygenation from 100 % O2 keeps the patient oxygenated


def test_co2_is_conserved():
    """CO2 in stores (lung gas, tissue, venous and transit blood) plus CO2 exhaled equals CO2 produced
    within 1 % over a course (ventilation change, PEEP change and FiO2 change)."""
    for new in (pc(rr=18), pc(rr=8), pc(peep=12, fio2=0.6)):
        c = simulate(PATIENT, pc(), new)
        assert abs(c.co2_balance_error) < 0.01


def test_no_change_is_flat():
    c = simulate(PATIENT, pc(), pc())
    assert np.ptp(c.pao2) < 0.05 and np.ptp(c.paco2) < 0.05


def test_long_course_ends_at_the_steady_state():
    """One physiology, two views: after a long course the state equals the steady-state engine's answer
    for the new settings (PaO2 within 1 mmHg, PaCO2 within 0.5 mmHg) for 50 random valid cases."""
    rng = np.random.default_rng(11)
    n = 50
    patients = PatientModel(
        pbw_kg=rng.uniform(50, 85, n), shunt_fixed=rng.uniform(0.02, 0.25, n), log_sd=rng.uniform(0.3, 1.1, n),
        dead_space_fraction=rng.uniform(0.05, 0.3, n), hb=rng.uniform(8, 15, n), vco2=rng.uniform(160, 260, n),
        vo2=rng.uniform(200, 320, n), cardiac_output_ref=rng.uniform(4, 7, n),
        mechanics=Mechanics(resistance=rng.uniform(6, 20, n), c_max=rng.uniform(30, 70, n),
                            recruitable=rng.uniform(0, 0.3, n)))
    now = Settings(mode="volume", fio2=rng.uniform(0.3, 0.7, n), peep=rng.uniform(5, 12, n),
                   vt_ml=rng.uniform(380, 480, n), rr=rng.uniform(14, 22, n), ti=0.9)
    new = Settings(mode="volume", fio2=rng.uniform(0.3, 0.9, n), peep=rng.uniform(5, 15, n),
                   vt_ml=rng.uniform(380, 480, n), rr=rng.uniform(12, 26, n), ti=0.9)
    c = simulate(patients, now, new, minutes=180, rtol=1e-5)
    assert np.all(c.success)
    assert np.max(np.abs(c.pao2[:, -1] - c.final.gas.pao2)) < 1.0
    assert np.max(np.abs(c.paco2[:, -1] - c.final.gas.paco2)) < 0.5


def test_peep_step_recruits_over_minutes():
    """Recruitment after a PEEP step continues for minutes (Katz 1981; Garnero 2015, from memory):
    PaO2 is still rising 5 minutes after the step in a recruitable lung."""
    pt = PATIENT.replace(recruitable=0.3, shunt_fixed=0.05)
    c = simulate(pt, pc(fio2=0.5, peep=5, inspiratory_pressure=14), pc(fio2=0.5, peep=14, inspiratory_pressure=14))
    i1, i5, i30 = (np.argmin(np.abs(c.minutes - m)) for m in (1, 5, 30))
    assert c.open_fraction[i30] > c.open_fraction[0]
    assert c.pao2[i5] < c.pao2[i30] - 2
    assert c.t90_pao2 > 3


def test_schedule_of_changes_and_events():
    changes = [Change(0.0, settings=pc(rr=16)), Change(20.0, patient={"shunt_fixed": 0.25}, label="atelectasis")]
    c = simulate(PATIENT, pc(), changes, minutes=40)
    i19, i39 = np.argmin(np.abs(c.minutes - 19.5)), -1
    assert c.pao2[i39] < c.pao2[i19] - 10
    assert c.minutes[1] - c.minutes[0] <= 0.25


def test_solver_options_pass_through_and_rhs_convention():
    c = simulate(PATIENT, pc(), pc(fio2=0.5), minutes=10, method="Radau", max_step=1.0)
    assert c.success
    import inspect
    assert list(inspect.signature(rhs).parameters)[:4] == ["t", "x", "u", "params"]


def test_batch_of_draws_gives_a_band():
    rng = np.random.default_rng(5)
    draws = PATIENT.replace(shunt_fixed=rng.uniform(0.04, 0.12, 20), log_sd=rng.uniform(0.5, 0.7, 20))
    c = simulate(draws, pc(), pc(fio2=0.5), minutes=30)
    assert c.pao2.shape == (20, c.minutes.size)
    lo, hi = np.percentile(c.pao2, [5, 95], axis=0)
    assert np.all(hi[1:] > lo[1:])


@pytest.mark.parametrize("kw,needle", [({"step_s": 30}, "step_s"), ({"minutes": 0}, "minutes")])
def test_bad_course_arguments(kw, needle):
    with pytest.raises(ValueError, match=needle):
        simulate(PATIENT, pc(), pc(fio2=0.5), **kw)


def test_change_outside_the_course_is_refused():
    with pytest.raises(ValueError, match="outside the course"):
        simulate(PATIENT, pc(), Change(90.0, settings=pc(fio2=0.5)), minutes=60)


def test_block_solve_of_the_newton_matrix_equals_a_general_sparse_lu():
    """Independent calculation: the stiff solver's Newton matrix I - cJ solved by its blocks (6 x 6 body
    stores and transit per case, then 2 x 2 per unit) gives SuperLU's answer, for breathing and apnoeic
    segments (whose Jacobian has exact zeros); a matrix with an entry outside those blocks is handed to
    SuperLU rather than solved wrongly."""
    from scipy import sparse
    from scipy.sparse.linalg import spsolve

    from ventcast.physiology.dynamics import course as K
    from ventcast.physiology.forecast import predict

    rng = np.random.default_rng(3)
    b = 7
    draws = PATIENT.replace(shunt_fixed=rng.uniform(0.03, 0.2, b), log_sd=rng.uniform(0.4, 1.0, b),
                            recruitable=rng.uniform(0.0, 0.2, b))
    target = predict(draws, pc(fio2=0.6, peep=10))
    for apnoea in (False, True):
        u = K._segment(target, draws, K.BodyStores(), draws.pbw_kg, apnoea)
        x = K._steady_state_vector(predict(draws, pc()), u)
        J = K._jacobian(x, u, K._jacobian_structure(b))
        blocks = K._BlockLU(b)
        for c in (0.01, 0.3, 2.0):
            A = sparse.identity(b * K.S, format="csc") - c * J
            r = rng.standard_normal(b * K.S)
            lu = blocks.factor(A)
            assert lu[0] == "blocks"
            np.testing.assert_allclose(blocks.solve(lu, r), spsolve(A, r), rtol=1e-9, atol=1e-12)
    outside = A.tolil()
    outside[0, K.I_TP] = 0.5  # unit 0's PO2 row leaning on a tissue state: not in the block structure
    outside = outside.tocsc()
    lu = blocks.factor(outside)
    assert lu[0] == "superlu"
    np.testing.assert_allclose(blocks.solve(lu, r), spsolve(outside, r), rtol=1e-9, atol=1e-12)


def test_output_pass_in_blocks_gives_the_one_pass_numbers(monkeypatch):
    """The output pass (states -> gases at every output time) runs in blocks of draws x times for speed;
    the numbers are those of one pass over the whole batch: every row is computed alone, only the contents'
    inversion stops per block (within its 1e-9 tolerance). 60 draws, each with its own blood, metabolic
    offset and perfusion weights (a low-V/Q mode), a change and an apnoeic pause, so that blocks split
    draws, times and segments and a row given another row's inputs shows."""
    import ventcast.physiology.dynamics.course as course

    rng = np.random.default_rng(4)
    b = 60
    draws = PatientModel(pbw_kg=70, shunt_fixed=rng.uniform(0.03, 0.2, b), log_sd=rng.uniform(0.4, 1.0, b),
                         dead_space_fraction=rng.uniform(0.1, 0.25, b), hb=rng.uniform(8, 15, b),
                         base_excess=rng.uniform(-6, 6, b), low_vq_fraction=rng.uniform(0.0, 0.3, b),
                         mechanics=Mechanics(resistance=10, c_max=rng.uniform(40, 60, b)))
    schedule = [Change(minute=0, settings=pc(fio2=0.5, peep=8)), Change(minute=10, apnoea=True),
                Change(minute=10.5, settings=pc(fio2=0.5, peep=8))]
    monkeypatch.setattr(course, "OUTPUT_BLOCK_ROWS", 333)  # blocks that cut through draws
    blocked = simulate(draws, pc(), schedule, minutes=20)
    monkeypatch.setattr(course, "OUTPUT_BLOCK_ROWS", 10 ** 9)
    whole = simulate(draws, pc(), schedule, minutes=20)
    assert blocked.success.all() and whole.success.all()
    for q, tol in (("pao2", 1e-5), ("paco2", 1e-6), ("sao2", 1e-8), ("ph", 1e-8), ("petco2", 1e-6), ("vd_vt", 1e-8)):
        a, w = getattr(blocked, q), getattr(whole, q)
        assert a.shape == w.shape == (b, whole.minutes.size)
        assert np.array_equal(np.isnan(a), np.isnan(w)), q  # PetCO2 and VD/VT have none during the apnoea
        assert np.nanmax(np.abs(a - w)) < tol, q
