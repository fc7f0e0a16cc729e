"""The multi-compartment V/Q lung against textbook identities, published behaviour and a reference solver."""

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from ventcast.physiology.bloodgas import oxygen
from ventcast.physiology.gasexchange import alveolar
from ventcast.physiology.gasexchange.compartments import LungParameters, solve_steady_state

HOMOGENEOUS = dict(alveolar_ventilation=4.3, cardiac_output=5.0, vo2=250.0, vco2=200.0, hb=15.0,
                   fio2=0.21, barometric=760.0)


def test_homogeneous_lung_obeys_the_alveolar_equations():
    """Textbook identities (digest 3.1-3.2): homogeneous lung, VA 4.3, Q 5, VO2 250, VCO2 200, Hb 15, air.

    PaCO2 equals the alveolar ventilation equation and PaO2 the full alveolar gas equation
    (R = VCO2/VO2 = 0.8) within 1 mmHg.
    """
    r = solve_steady_state(LungParameters(**HOMOGENEOUS))
    assert r.success
    assert r.paco2 == pytest.approx(alveolar.paco2_alveolar_ventilation(200, 4.3), abs=1.0)
    assert r.pao2 == pytest.approx(alveolar.alveolar_po2(0.21, float(r.paco2), 0.8), abs=1.0)


@pytest.mark.parametrize("kw,pao2,paco2,sao2", [
    ({}, 101.7, 40.1, 0.979),
    ({"fio2": 0.40}, 239.0, 40.1, 0.998),
    ({"fio2": 1.00}, 672.8, 40.1, 1.000),
    ({"shunt": 0.1}, 78.4, 40.7, 0.954),
    ({"shunt": 0.2, "fio2": 0.5}, 91.5, 41.8, 0.970),
    ({"shunt": 0.3, "fio2": 1.0}, 103.7, 43.4, 0.978),
    ({"shunt": 0.5}, 40.3, 45.0, 0.739),
    ({"log_sd": 0.5}, 86.3, 41.7, 0.964),
    ({"log_sd": 1.0}, 59.7, 47.0, 0.892),
    ({"log_sd": 1.0, "fio2": 0.5}, 256.9, 47.7, 0.998),
    ({"log_sd": 1.0, "fio2": 1.0}, 664.9, 47.7, 1.000),
    ({"log_sd": 1.5}, 40.8, 57.2, 0.706),
])
def test_against_the_digest_reference_implementation(kw, pao2, paco2, sao2):
    """Digest 4.1 table (rows 38-40): self-consistency values [X] of an independent implementation of
    West 1969 with the same chemistry; not outside data, but a second implementation's numbers."""
    r = solve_steady_state(LungParameters(**{**HOMOGENEOUS, **kw}))
    assert r.success
    assert r.pao2 == pytest.approx(pao2, abs=1.0)
    assert r.paco2 == pytest.approx(paco2, abs=0.5)
    assert r.sao2 == pytest.approx(sao2, abs=0.002)


@pytest.mark.parametrize("shunt", [0.05, 0.15, 0.3, 0.5])
@pytest.mark.parametrize("fio2", [0.21, 0.5, 1.0])
def test_berggren_recovers_the_shunt_put_in(shunt, fio2):
    """Identity: Berggren 1942 applied to the model's own end-capillary, arterial and mixed-venous
    contents returns the true shunt within 0.5 %."""
    r = solve_steady_state(LungParameters(**{**HOMOGENEOUS, "shunt": shunt, "fio2": fio2}))
    hb = 15.0
    p_end, c_end = float(r.unit_po2[25]), float(r.unit_pco2[25])
    from ventcast.physiology.bloodgas.acidbase import ph_blood_buffer_line
    s = oxygen.saturation(p_end, 7.40, c_end)  # first guess, then close the S-pH loop
    for _ in range(30):
        ph = ph_blood_buffer_line(c_end, s, hb)
        s = oxygen.saturation(p_end, ph, c_end)
    cc = oxygen.o2_content(p_end, s, hb)
    q = alveolar.shunt_berggren(cc, float(r.cao2), float(r.cvo2))
    assert q == pytest.approx(shunt, rel=0.005)


@pytest.mark.parametrize("kw", [
    {}, {"shunt": 0.3, "log_sd": 1.2, "fio2": 0.6}, {"log_sd": 1.8, "fio2": 0.9, "alveolar_ventilation": 9},
    {"dead_space_fraction": 0.3, "log_sd": 0.8, "high_vq_fraction": 0.25, "fio2": 0.4},
    {"temperature": 39.5, "hb": 8.0, "vo2": 320, "vco2": 270, "cardiac_output": 7.5, "alveolar_ventilation": 7},
])
def test_mass_balance(kw):
    """Mass balance: O2 uptake and CO2 output summed over units equal VO2 and VCO2 within 0.1 %."""
    p = LungParameters(**{**HOMOGENEOUS, **kw})
    r = solve_steady_state(p)
    assert r.success, r.message
    assert r.o2_uptake == pytest.approx(np.asarray(p.vo2), rel=1e-3)
    assert r.co2_output == pytest.approx(np.asarray(p.vco2), rel=1e-3)
    # The expired gas carries the same CO2: VCO2 = VE x PECO2 / k.
    ve = np.asarray(p.alveolar_ventilation) + np.asarray(p.series_ventilation)
    assert ve * r.pe_co2 / alveolar.btps_factor(p.temperature) == pytest.approx(np.asarray(p.vco2), rel=1e-3)


def test_shunt_hypoxaemia_resists_oxygen_but_vq_mismatch_does_not():
    """West 1969; Benatar, Hewlett & Nunn 1973 iso-shunt diagram (from memory): with 30 % shunt,
    FiO2 0.21 -> 1.0 raises PaO2 by less than 60 mmHg; with V/Q mismatch alone (log SD 1.0) FiO2 1.0
    gives PaO2 above 550 mmHg."""
    shunted = solve_steady_state(LungParameters(**{**HOMOGENEOUS, "shunt": 0.3, "fio2": np.array([0.21, 1.0])}))
    assert shunted.success.all()
    assert shunted.pao2[1] - shunted.pao2[0] < 60
    mismatched = solve_steady_state(LungParameters(**{**HOMOGENEOUS, "log_sd": 1.0, "fio2": 1.0}))
    assert mismatched.pao2 > 550


def test_vq_mismatch_at_fixed_ventilation_raises_paco2():
    """West 1969 (from memory): V/Q inequality at fixed total ventilation raises PaCO2."""
    r = solve_steady_state(LungParameters(**{**HOMOGENEOUS, "log_sd": np.array([0.0, 0.5, 1.0, 1.5])}))
    assert np.all(np.diff(r.paco2) > 0)


def test_iso_shunt_shape():
    """Benatar, Hewlett & Nunn 1973 iso-shunt lines (from memory; digest 4.2 grid, +/-10 % for figure
    comparison): shunt 10 % at FiO2 0.5 gives a PaO2 near 158 mmHg."""
    r = solve_steady_state(LungParameters(**{**HOMOGENEOUS, "shunt": 0.10, "fio2": 0.5, "hb": 14.0}))
    assert r.pao2 == pytest.approx(158.1, rel=0.10)


def test_fio2_one_needs_no_special_case():
    r = solve_steady_state(LungParameters(**{**HOMOGENEOUS, "fio2": np.array([0.9999, 1.0]), "log_sd": 1.0,
                                             "shunt": 0.1}))
    assert r.success.all()
    assert abs(r.pao2[1] - r.pao2[0]) < 0.5


def test_batch_equals_single_calls():
    shunts = np.array([0.0, 0.2, 0.4])
    fio2 = np.array([0.3, 0.6, 0.9])
    batch = solve_steady_state(LungParameters(**{**HOMOGENEOUS, "shunt": shunts, "fio2": fio2, "log_sd": 0.9}))
    for i in range(3):
        one = solve_steady_state(LungParameters(**{**HOMOGENEOUS, "shunt": shunts[i], "fio2": fio2[i], "log_sd": 0.9}))
        assert batch.pao2[i] == pytest.approx(float(one.pao2), abs=1e-6)
        assert batch.paco2[i] == pytest.approx(float(one.paco2), abs=1e-6)


def test_outputs_are_consistent():
    r = solve_steady_state(LungParameters(**{**HOMOGENEOUS, "shunt": 0.2, "log_sd": 1.0, "fio2": 0.5,
                                             "dead_space_fraction": 0.2, "series_ventilation": 2.0}))
    assert r.success
    assert r.pf_ratio == pytest.approx(float(r.pao2) / 0.5)
    assert r.aa_gradient == pytest.approx(float(r.alveolar_po2 - r.pao2))
    assert 0 < r.pe_co2 < r.petco2 < r.paco2
    assert r.vd_vt == pytest.approx(float((r.paco2 - r.pe_co2) / r.paco2))
    assert r.venous_admixture > r.shunt  # low-V/Q units add admixture at FiO2 0.5
    assert r.unit_ventilation.sum() == pytest.approx(0.8 * 4.3, rel=1e-9)
    assert r.unit_perfusion.sum() == pytest.approx(0.8 * 5.0, rel=1e-9)
    assert r.pvo2 < r.pao2 and r.svo2 < r.sao2


def test_no_steady_state_is_said_not_hidden():
    """VO2 the lung cannot deliver: success False, a reason, and no number."""
    r = solve_steady_state(LungParameters(**{**HOMOGENEOUS, "shunt": 0.6, "log_sd": 2.0, "vo2": 500,
                                             "cardiac_output": 2.0, "alveolar_ventilation": 2.0}))
    assert not r.success
    assert "no physiological steady state" in r.message
    assert np.isnan(r.pao2) and np.isnan(r.paco2)


def test_iteration_limit_is_reported():
    r = solve_steady_state(LungParameters(**{**HOMOGENEOUS, "log_sd": 1.0}), max_iter=2)
    assert not r.success and "did not converge" in r.message and np.isnan(r.pao2)


@pytest.mark.parametrize("kw,needle", [({"fio2": 60}, "did you mean 0.60"), ({"shunt": -0.1}, "shunt"),
                                       ({"cardiac_output": 0}, "cardiac_output"), ({"hb": float("nan")}, "hb")])
def test_bad_input(kw, needle):
    with pytest.raises(ValueError, match=needle):
        solve_steady_state(LungParameters(**{**HOMOGENEOUS, **kw}))


def _random_lungs(n, seed):
    """Random cases over the solver's domain, a low-V/Q mode in 40 % of them."""
    rng = np.random.default_rng(seed)
    return dict(shunt=rng.uniform(0, 0.5, n), log_sd=rng.uniform(0.05, 2.3, n), alveolar_ventilation=rng.uniform(2, 12, n),
                cardiac_output=rng.uniform(2.5, 9, n), fio2=rng.uniform(0.21, 1.0, n),
                dead_space_fraction=rng.uniform(0, 0.6, n), vo2=rng.uniform(150, 400, n), vco2=rng.uniform(120, 350, n),
                hb=rng.uniform(7, 16, n), low_vq_ratio=rng.uniform(0.02, 0.3, n),
                low_vq_fraction=np.where(rng.uniform(size=n) < 0.4, rng.uniform(0, 0.5, n), 0.0))


def test_warm_start_reaches_the_same_state_in_fewer_iterations():
    """Started from the solution of nearby parameters (as the fit's sampler does), the solver reaches
    the state it reaches from its standard guesses (within its own accuracy, about tol squared)."""
    from ventcast.physiology.gasexchange.compartments import warm_start

    cases = _random_lungs(300, 11)
    before = solve_steady_state(LungParameters(**cases))
    rng = np.random.default_rng(12)
    moved = {k: np.clip(v * np.exp(0.03 * rng.standard_normal(v.size)), 0, None) for k, v in cases.items()}
    moved["fio2"] = np.clip(moved["fio2"], 0.21, 1.0)
    cold = solve_steady_state(LungParameters(**moved))
    warm = solve_steady_state(LungParameters(**moved), start=warm_start(before))
    assert np.array_equal(cold.success, warm.success) and cold.success.sum() > 200
    ok = cold.success
    for q in ("pao2", "paco2", "pvo2", "ph"):
        assert np.max(np.abs(getattr(cold, q)[ok] - getattr(warm, q)[ok])) < 1e-6, q
    # Fewer iterations: many more cases have settled after five.
    from ventcast.physiology.gasexchange import compartments as c
    a, _ = LungParameters(**moved).arrays()
    settled_cold = np.sum(c._solve_arrays(a, 1e-4, 5)["ok"])
    settled_warm = np.sum(c._solve_arrays(a, 1e-4, 5, warm_start(before))["ok"])
    assert settled_warm > 2 * settled_cold, (settled_warm, settled_cold)
    with pytest.raises(ValueError, match="warm start has 300 cases for a batch of 2"):
        solve_steady_state(LungParameters(**{k: v[:2] for k, v in moved.items()}), start=warm_start(before))


def test_chunks_and_continued_states_equal_one_pass():
    """A batch solved in chunks equals one chunk, and a case stopped early continues from its last
    iterate to the state it reaches alone. Cases with and without a high-V/Q mode mixed (70 and 50
    unit columns): a 50-column case continued from a 70-column state uses its main units and blood."""
    from ventcast.physiology.gasexchange import compartments as c

    cases = _random_lungs(400, 13)
    rng = np.random.default_rng(14)
    cases["high_vq_fraction"] = np.where(rng.uniform(size=400) < 0.2, rng.uniform(0.05, 0.3, 400), 0.0)
    a, _ = LungParameters(**cases).arrays()
    chunk = c.CHUNK
    try:
        c.CHUNK = 64
        chunked = c._solve_batch(a, 1e-4, 80, None)
    finally:
        c.CHUNK = chunk
    one = c._solve_arrays(a, 1e-4, 80, None)
    assert np.array_equal(chunked["ok"], one["ok"]) and chunked["ok"].sum() > 300
    assert chunked["unit_vq"].shape == one["unit_vq"].shape == (400, 70)
    ok = one["ok"]
    for q in ("pao2", "paco2", "unit_po2"):
        assert np.nanmax(np.abs(chunked[q][ok] - one[q][ok])) < 1e-12, q
    first = c._solve_arrays(a, 1e-4, 3, None)
    plain = np.flatnonzero((cases["high_vq_fraction"] == 0) & (first["reasons"] == c._NOT_CONVERGED))
    assert plain.size > 20 and first["unit_vq"].shape[1] == 70
    sub = {k: v[plain] for k, v in a.items()}
    redo = c._solve_arrays(sub, 1e-4, 77, {k: v[plain] for k, v in first["_state"].items()})
    assert redo["unit_vq"].shape[1] == 50
    alone = c._solve_arrays(sub, 1e-4, 80, None)
    done = alone["ok"] & redo["ok"]
    assert done.sum() > 0.8 * plain.size
    assert np.max(np.abs(redo["pao2"][done] - alone["pao2"][done])) < 1e-6


def test_newton_rows_split_across_two_threads_give_the_same_numbers():
    """The batch's Newton loop split between two threads (rows are independent) gives every case the
    numbers of one pass, bit for bit, also while two callers share the helper thread at once."""
    from concurrent.futures import ThreadPoolExecutor

    from ventcast.physiology.gasexchange import compartments as c

    a, _ = LungParameters(**_random_lungs(300, 21)).arrays()
    keep = c.PARALLEL_MIN_ROWS
    try:
        c.PARALLEL_MIN_ROWS = 10 ** 9
        serial = c._solve_arrays(a, 1e-4, 80, None)
        c.PARALLEL_MIN_ROWS = 2
        with ThreadPoolExecutor(max_workers=2) as pool:
            split = list(pool.map(lambda _i: c._solve_arrays(a, 1e-4, 80, None), range(4)))
    finally:
        c.PARALLEL_MIN_ROWS = keep
    assert serial["ok"].sum() > 200  # some random lungs have no steady state: their failures must match too
    for other in split:
        assert np.array_equal(other["ok"], serial["ok"])
        for q in ("pao2", "paco2", "ph", "cvo2", "unit_po2", "unit_pco2"):
            assert np.array_equal(other[q], serial[q], equal_nan=True), q


def test_sampler_tolerance_moves_the_gases_by_under_one_percent_of_their_sd():
    """The fit's sampler solves to SAMPLER_TOL: over 4,000 random cases of the domain its blood gases
    differ from the default tolerance's by under 1 % of the smallest measurement SD of each
    (physiology.measurement: PaO2 2 mmHg, PaCO2 1.5 mmHg, pH 0.01)."""
    from ventcast.physiology.fitting.fit import SAMPLER_TOL
    from ventcast.physiology.measurement import SD

    cases = LungParameters(**_random_lungs(4000, 5))
    exact, loose = solve_steady_state(cases), solve_steady_state(cases, tol=SAMPLER_TOL)
    assert np.array_equal(exact.success, loose.success)
    ok = exact.success
    for q in ("pao2", "paco2", "ph"):
        assert np.max(np.abs(getattr(exact, q)[ok] - getattr(loose, q)[ok])) < 0.01 * SD[q][0], q


@pytest.mark.slow
def test_fast_solver_matches_the_reference_solver():
    """Fast solver against the per-unit fsolve reference on 200 random cases: within 0.1 mmHg."""
    from reference_solver import solve_reference

    rng = np.random.default_rng(2026)
    n = 200
    cases = dict(fio2=rng.uniform(0.21, 1.0, n), shunt=rng.uniform(0, 0.45, n), log_sd=rng.uniform(0, 1.3, n),
                 alveolar_ventilation=rng.uniform(3, 12, n), cardiac_output=rng.uniform(3, 8, n),
                 vo2=rng.uniform(180, 320, n), vco2=rng.uniform(150, 260, n), hb=rng.uniform(8, 16, n),
                 dead_space_fraction=rng.uniform(0, 0.3, n), temperature=rng.uniform(35.5, 39.5, n),
                 high_vq_fraction=np.where(rng.uniform(size=n) < 0.25, rng.uniform(0, 0.3, n), 0.0))
    fast = solve_steady_state(LungParameters(**cases))
    compared = 0
    for i in range(n):
        ref = solve_reference(LungParameters(**{k: float(v[i]) for k, v in cases.items()}))
        if not (ref["success"] and fast.success[i]):
            continue
        compared += 1
        assert abs(ref["pao2"] - fast.pao2[i]) < 0.1, i
        assert abs(ref["paco2"] - fast.paco2[i]) < 0.1, i
        assert abs(ref["pvo2"] - fast.pvo2[i]) < 0.1, i
    assert compared >= 180, compared  # both solvers succeed on >= 90 % of the draws


domain = dict(
    fio2=st.floats(0.21, 1.0), shunt=st.floats(0.0, 0.6), log_sd=st.floats(0.0, 2.0),
    alveolar_ventilation=st.floats(1.0, 20.0), cardiac_output=st.floats(2.0, 10.0),
    vo2=st.floats(100.0, 500.0), vco2=st.floats(80.0, 400.0), hb=st.floats(5.0, 20.0),
    temperature=st.floats(34.0, 41.0),
)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(**domain, dfio2=st.floats(0.01, 0.3), dva=st.floats(0.1, 5.0))
def test_domain_properties(fio2, shunt, log_sd, alveolar_ventilation, cardiac_output, vo2, vco2, hb,
                           temperature, dfio2, dva):
    """Over the documented domain: converges or says there is no steady state (never NaN on success);
    PaO2 never falls when FiO2 rises; PaCO2 never rises when VA rises."""
    base = dict(shunt=shunt, log_sd=log_sd, cardiac_output=cardiac_output, vo2=vo2, vco2=vco2, hb=hb,
                temperature=temperature)
    f2 = min(fio2 + dfio2, 1.0)
    va2 = min(alveolar_ventilation + dva, 30.0)
    r = solve_steady_state(LungParameters(**base, fio2=np.array([fio2, f2, fio2]),
                                          alveolar_ventilation=np.array([alveolar_ventilation,
                                                                         alveolar_ventilation, va2])))
    for i in range(3):
        if r.success[i]:
            for name in ("pao2", "paco2", "ph", "sao2", "pvo2", "vd_vt", "petco2"):
                assert np.isfinite(getattr(r, name)[i]), name
        else:
            assert r.reasons[i], "a failure must carry its reason"
            assert "no physiological steady state" in r.reasons[i], r.reasons[i]
    if r.success[0] and r.success[1]:
        assert r.pao2[1] >= r.pao2[0] - 1e-6 * r.pao2[0]
    if r.success[0] and r.success[2]:
        assert r.paco2[2] <= r.paco2[0] + 1e-6 * r.paco2[0]


def test_coarse_unit_grid_is_close_to_the_full_one():
    """The coarse grid (UNIT_GRIDS["coarse"], a third of the units) is only the posterior sampler's proposal
    device: its draws are corrected to the full lung (tests/test_fitting.py checks the correction). It
    must stay close enough to keep that correction cheap: over 4,000 random cases of the domain (a
    low-V/Q mode in 40 %), PaO2 and PaCO2 differ from the full grid's by under 0.1 measurement SD in the
    median case and under 1 SD in 99 % of cases (physiology.measurement: SD = a + b x value)."""
    from ventcast.physiology.measurement import SD

    cases = LungParameters(**_random_lungs(4000, 5))
    full, coarse = solve_steady_state(cases), solve_steady_state(cases, units="coarse")
    ok = full.success & coarse.success
    assert ok.sum() > 0.95 * full.success.sum()
    for q in ("pao2", "paco2"):
        ref = getattr(full, q)[ok]
        error = np.abs(getattr(coarse, q)[ok] - ref) / (SD[q][0] + SD[q][1] * ref)
        print(q, "median", np.median(error), "p99", np.percentile(error, 99), "max", error.max())
        assert np.median(error) < 0.1 and np.percentile(error, 99) < 1.0, q
    with pytest.raises(ValueError, match="units"):
        solve_steady_state(cases, units="fine")


def test_compiled_contents_equal_the_numpy_ones():
    """The Newton kernel's blood contents (compiled by numba, cached) and the same function run by numpy
    on arrays agree to rounding over the domain, derivatives included. Numba's cache does not see a change
    of the constants it froze in from other modules (Severinghaus's, O2 solubility, ...): a stale cache
    fails here."""
    from ventcast.physiology.gasexchange import _newton as k
    from ventcast.physiology.gasexchange.compartments import blood_chemistry

    rng = np.random.default_rng(31)
    n = 2000
    blood = blood_chemistry(rng.uniform(4, 20, n), rng.uniform(32, 41, n), rng.uniform(-20, 20, n),
                            rng.uniform(1.30, 1.40, n))
    p, c, s = rng.uniform(5, 700, n), rng.uniform(10, 150, n), rng.uniform(0.05, 1.0, n)
    consts = (blood.hb, blood.hct, blood.t, blood.offset, blood.cap, blood.sol, blood.log_kelman_t, blood.dpk_dp)
    arrays = k.content_terms(p, c, s, *consts)
    compiled = np.array([k._contents(p[i], c[i], s[i], *(float(x[i]) for x in consts)) for i in range(0, n, 7)])
    for j, name in enumerate(("O2", "CO2", "S", "pH", "dO2/dp", "dO2/dc", "dCO2/dp", "dCO2/dc")):
        want = arrays[j][::7]
        assert np.allclose(compiled[:, j], want, rtol=1e-12, atol=1e-14), name


def test_compiled_newton_loop_flags_a_division_by_zero_as_a_failure():
    """The lung's Newton loop replaced array code in which a division by zero became inf and failed the
    case through its finiteness check; compiled, it must flag the case (non-finite numbers) rather than
    raise. A unit with zero V/Q divides by zero in its O2 balance."""
    from ventcast.physiology.gasexchange._newton import newton

    vq, w = np.array([[0.0, 1.0, 2.0]]), np.array([[0.3, 0.4, 0.3]])
    case = np.array([[8.5, 713.0, 0.5, 0.9, 0.1, 5.0, 4.0, 0.3]])
    blood = np.array([[12.0, 0.36, 37.0, 0.0, 16.0, 0.0307, 0.0, 0.042]])
    flags = np.zeros((1, 7))
    newton(vq, w, case, blood, np.full((1, 5), 60.0), np.full((1, 5), 45.0), np.array([15.0]), np.array([50.0]),
           np.full((1, 5), 0.9), 1e-4, 80, np.empty((1, 5)), np.empty((1, 5)), np.empty((1, 5)), np.empty((1, 3)),
           np.empty((1, 3)), np.empty((1, 4, 3)), np.empty((1, 4, 2)), flags)
    assert flags[0, 5] == 1.0 and flags[0, 4] == 0.0  # non-finite, not converged
