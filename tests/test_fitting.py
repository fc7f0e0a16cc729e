"""Patient fit: round trip, recovery, identifiability, input refusals, calibration of the likely range."""

import numpy as np
import pytest

from ventcast.physiology.fitting.fit import (PARAMETERS, InputError, Observation, Patient, _from_z, _sd, _to_z, build_model,
                                    fit, likely_range, next_best_measurement, population_defaults)
from ventcast.physiology.forecast import predict
from ventcast.physiology.mechanics.ventilator import Settings

PT = Patient(sex="female", height_cm=165, weight_kg=78, temperature_c=37.8, hb_g_dl=10.5)
TRUE = {"shunt_fixed": 0.18, "recruitable": 0.12, "log_sd": 1.0, "dead_space_fraction": 0.25, "vco2": 210.0,
        "vo2": 260.0, "cardiac_output_ref": 5.5, "c_max": 35.0, "resistance": 14.0, "base_excess": -2.0}


def vc(fio2=0.6, peep=10, vt=400, rr=20):
    return Settings(mode="volume", fio2=fio2, peep=peep, vt_ml=vt, rr=rr, ti=0.9, apparatus_dead_space_ml=50)


def observe(settings, true=TRUE, patient=PT, rng=None):
    p = predict(build_model(patient, true, 10.0), settings)
    assert p.success
    g, b = p.gas, p.breathing

    def v(q, x):
        return float(x) + (rng.normal(0, _sd(q, float(x))) if rng is not None else 0.0)

    return Observation(settings=settings, pao2=v("pao2", g.pao2), paco2=v("paco2", g.paco2), ph=v("ph", g.ph),
                       petco2=v("petco2", g.petco2), pplat=v("pplat", b.pplat), ppeak=v("ppeak", b.ppeak))


def test_round_trip_reproduces_each_observation():
    obs = [observe(vc(0.5, 8)), observe(vc(0.6, 10))]
    f = fit(PT, obs)
    assert f.success, f.message
    for o in obs:
        p = predict(f.model, o.settings)
        assert abs(float(p.gas.pao2) - o.pao2) <= max(2.0, 0.03 * o.pao2)
        assert abs(float(p.gas.paco2) - o.paco2) <= 1.0
        assert abs(float(p.gas.ph) - o.ph) <= 0.01


def test_several_fio2_levels_recover_shunt_and_vq_mismatch():
    """Karbing 2007: blood gases at several FiO2 separate shunt from V/Q mismatch."""
    obs = [observe(vc(f, 10)) for f in (0.35, 0.6, 0.9)]
    f = fit(PT, obs)
    assert f.success
    total_shunt = float(predict(f.model, vc(0.6, 10)).shunt)
    true_shunt = float(predict(build_model(PT, TRUE, 10.0), vc(0.6, 10)).shunt)
    assert total_shunt == pytest.approx(true_shunt, abs=0.04)
    assert f.estimates["log_sd"] == pytest.approx(TRUE["log_sd"], abs=0.3)
    assert not any("single FiO2" in m for m in f.identifiability)


def test_one_observation_says_it_cannot_separate():
    f = fit(PT, [observe(vc())])
    assert any("cannot be separated" in m and "single FiO2" in m for m in f.identifiability)
    assert any("recruitability is not informed" in m for m in f.identifiability)


def test_likely_range_and_next_best_measurement():
    f = fit(PT, [observe(vc())])
    trial = vc(0.5, 14, rr=22)
    rng_, table, ok = likely_range(f, trial)
    lo, hi = rng_["pao2"]
    assert lo < hi and ok > 0.95
    assert set(rng_) == {"pao2", "paco2", "ph", "sao2"}
    ranked = next_best_measurement(f, trial)
    assert ranked and ranked[0]["score"] >= ranked[-1]["score"]
    assert all("narrow" in c["why"] for c in ranked)
    assert any("FiO2" in c["probe"] for c in ranked) and any("PEEP" in c["probe"] for c in ranked)


def test_refuses_pao2_above_alveolar():
    bad = Observation(settings=vc(0.3), pao2=250, paco2=40, ph=7.4)
    with pytest.raises(InputError, match=r"PaO2 250 mmHg is above the alveolar PO2 at FiO2 0.3.*FiO2 recorded wrongly"):
        fit(PT, [bad])


def test_refuses_ph_paco2_hco3_mismatch():
    bad = Observation(settings=vc(), pao2=70, paco2=40, ph=7.40, hco3=30)
    with pytest.raises(InputError, match=r"Henderson-Hasselbalch gives HCO3 24.5"):
        fit(PT, [bad])


def test_warns_on_petco2_above_paco2_and_sao2_mismatch():
    o = observe(vc())
    odd = Observation(settings=o.settings, pao2=o.pao2, paco2=o.paco2, ph=o.ph, petco2=o.paco2 + 8, sao2=0.70)
    f = fit(PT, [odd])
    assert any("PetCO2" in w and "above PaCO2" in w for w in f.warnings)
    assert any("SaO2 70 % is inconsistent" in w for w in f.warnings)


def test_needs_an_observation():
    with pytest.raises(InputError, match="at least one observation"):
        fit(PT, [])


def test_sampler_that_cannot_finish_says_so(monkeypatch):
    """Honest failure: a sampler that does not reach the posterior gives no likely range and no success."""
    import ventcast.physiology.fitting.fit as fitting
    monkeypatch.setattr(fitting, "MAX_STAGES", 1)
    f = fit(PT, [observe(vc(0.5, 8)), observe(vc(0.6, 10))])
    assert not f.success
    assert "no likely range could be computed" in f.message and "did not reach the posterior" in f.message


def test_estimate_first_then_the_same_draws():
    """fit(sample=False) gives the estimate alone, refuses a likely range, and sample_posterior then gives
    exactly the draws, ranges and message of fit(sample=True) with the same seed."""
    from ventcast.physiology.fitting.fit import sample_posterior

    obs = [observe(vc(0.5, 8)), observe(vc())]
    whole = fit(PT, obs, seed=3)
    first = fit(PT, obs, seed=3, sample=False)
    assert not first.sampled and first.draws is None and first.ranges == {}
    assert first.estimates == whole.estimates and first.message == whole.message
    with pytest.raises(ValueError, match="posterior draws have not been computed"):
        likely_range(first, vc(0.7, 12))
    done = sample_posterior(first)
    assert done.sampled and done.ranges == whole.ranges and done.message == whole.message
    assert np.array_equal(done.draws.shunt_fixed, whole.draws.shunt_fixed)
    assert sample_posterior(done) is done


def test_sampler_reports_its_work():
    f = fit(PT, [observe(vc())])
    s = f.sampler
    assert s["stages"] >= 2 and s["moves"] >= 5 * s["stages"]
    final = [a for a in s["acceptance"] if a[0] == 1.0]
    assert final and all(0.0 < np.nanmean(a[1:]) < 1.0 for a in final)
    assert 0.5 < s["correction_ess"] <= 1.0 and s["correction_moves"] >= 2


class _TwoLungs:
    """A stand-in for the fit's problem with known posteriors: Gaussian likelihoods whose posterior on
    the "full" grid has mean FULL_MEAN and SD 0.5, and on the "coarse" grid mean COARSE_MEAN and SD 0.6
    (a coarse lung that is a biased, wider approximation), under a N(0, 3^2) prior."""

    FULL_MEAN, COARSE_MEAN = np.array([1.0, -1.0]), np.array([1.5, -0.5])

    def __init__(self):
        self.pm, self.ps = np.zeros(2), np.full(2, 3.0)
        self.groups = {"volume": [0]}
        self.calls = {"full": 0, "coarse": 0}

    def log_posterior(self, Z, start=None, units="full"):
        self.calls[units] += Z.shape[0]
        self.states = {"volume": {"x": np.zeros(Z.shape[0])}}
        mean, sd = (self.FULL_MEAN, 0.5) if units == "full" else (self.COARSE_MEAN, 0.6)
        # likelihood whose product with the prior has the stated posterior
        prec = 1.0 / sd ** 2 - 1.0 / self.ps ** 2
        centre = mean / sd ** 2 / prec
        return -0.5 * np.sum(prec * (Z - centre) ** 2, axis=1) - 0.5 * np.sum((Z / self.ps) ** 2, axis=1)


def test_sampler_draws_come_from_the_full_lung_not_the_coarse_one():
    """The tempering runs on the coarse lung; the correction (importance weights full / coarse, then
    delayed-acceptance moves, Christen & Fox 2005) must leave draws of the full lung's posterior. On two
    Gaussians known in closed form, 2,000 draws: mean within 0.05 and SD within 0.05 of the full
    posterior's (Monte Carlo error about 0.02), while the coarse posterior sits 0.5 away and 0.1 wider."""
    from ventcast.physiology.fitting.fit import _posterior_draws

    problem = _TwoLungs()
    Z, info = _posterior_draws(problem, np.eye(2), 2000, np.random.default_rng(4))
    assert np.all(np.abs(Z.mean(axis=0) - _TwoLungs.FULL_MEAN) < 0.05), Z.mean(axis=0)
    assert np.all(np.abs(Z.std(axis=0) - 0.5) < 0.05), Z.std(axis=0)
    assert info["correction_ess"] < 0.7  # the coarse posterior really was off: the correction had work to do
    assert problem.calls["full"] < problem.calls["coarse"]


def random_patient(rng):
    """A synthetic patient and parameters drawn from the fit's own priors (calibration sets)."""
    pt = Patient(sex=str(rng.choice(["female", "male"])), height_cm=rng.uniform(155, 190),
                 weight_kg=rng.uniform(55, 110), hb_g_dl=rng.uniform(8, 14), temperature_c=rng.uniform(36.5, 38.5))
    prior = population_defaults(pt)
    return pt, {n: float(_from_z(n, rng.normal(_to_z(n, prior["mean"][n]), prior["sd"][n]))) for n in PARAMETERS}


def random_settings(pt, rng):
    """Settings of one or two blood gases (the earlier at another FiO2 and PEEP): fio2, peep, vt, rr, list."""
    fio2 = float(np.round(rng.uniform(0.35, 0.8), 2))
    peep = float(rng.integers(5, 15))
    vt = float(np.round(pt.pbw_kg * rng.uniform(6, 8)))
    rr = float(rng.integers(14, 27))
    settings = [vc(fio2, peep, vt, rr)]
    if rng.integers(1, 3) == 2:
        settings.insert(0, vc(float(np.clip(fio2 + rng.choice([-0.15, 0.15]), 0.25, 1.0)), max(5.0, peep - 2), vt, rr))
    return fio2, peep, vt, rr, settings


@pytest.mark.slow
def test_likely_range_is_calibrated():
    """Over 200 synthetic patients drawn from the population priors, with noisy observations (one or
    two blood gases), the 90 % likely range of PaO2 and PaCO2 after a change (FiO2 +/-0.1, PEEP +2,
    RR +2) covers the true value in 85-95 % of cases (the issue's criterion; a range that is exact
    covers 90 %, with a binomial SD of about 2 % over 200 cases).

    History on this set: importance sampling around the Laplace Gaussian gave 0.82 (PaO2); the tempered
    SMC sampler 0.88 and 0.905 with ten parameters; with the RQ, series dead space, inflection and
    overdistension dead space fitted (13 parameters) 0.83 and 0.89, and with the model-error term
    (fit.MODEL_ERROR_LOG_SD) the figures in README's model section.

    The same fits check the point forecast: see :func:`check_point_forecast`."""
    rng = np.random.default_rng(5)
    hits = {"pao2": [], "paco2": []}
    errors = []
    while len(hits["pao2"]) < 200:
        pt, true = random_patient(rng)
        fio2, peep, vt, rr, settings = random_settings(pt, rng)
        model = build_model(pt, true, 10.0)
        if not all(predict(model, s).success for s in settings):
            continue
        try:
            f = fit(pt, [observe(s, true, pt, rng) for s in settings], n_draws=200, seed=len(hits["pao2"]))
        except ValueError:
            continue  # a noisy draw outside the accepted input range
        trial = vc(float(np.clip(fio2 + rng.choice([-0.1, 0.1]), 0.21, 1.0)), min(peep + 2, 30.0), vt, rr + 2)
        truth = predict(model, trial)
        if not truth.success:
            continue
        ranges, table, _ok = likely_range(f, trial, quantities=("pao2", "paco2"))
        for q in hits:
            lo, hi = ranges[q]
            hits[q].append(lo <= float(getattr(truth.gas, q)) <= hi)
        errors.append(point_errors(f, trial, table, {q: float(getattr(truth.gas, q)) for q in hits}))
    coverage = {q: float(np.mean(v)) for q, v in hits.items()}
    print("likely-range coverage", coverage)
    for q, c in coverage.items():
        assert 0.85 <= c <= 0.95, (q, c)
    check_point_forecast(errors, "prior-drawn")



@pytest.mark.slow
def test_sampler_is_calibrated_with_several_gases():
    """The sampler alone, where the data identify the lung: 100 synthetic patients drawn from the priors,
    each with 3-6 noisy blood gases at FiO2 within 0.2 and PEEP within 4 cmH2O of each other. The 90 %
    range of the draws' own forecasts after a change (FiO2 +/-0.1, PEEP +2, RR +2), without the
    model-error term (these patients have the model's structure), covers the true PaO2 and PaCO2 in
    84-96 % of cases: an exact posterior covers 90 % (binomial SD 3 % over 100; the independent reference
    is the generating patient's own steady state). Measured on this set 87 % and 88 % (97 % and 94 % with
    the model-error term, as shown: held to at least 90 %); on 380 other such patients 90 % and 92 %. The
    same check with one or two gases gives 83 % and 91 % (README's model section)."""
    from ventcast.physiology.fitting.fit import _tile_settings

    rng = np.random.default_rng(9)
    hits = {"pao2": [], "paco2": []}
    shown = {"pao2": [], "paco2": []}
    while len(hits["pao2"]) < 100:
        pt, true = random_patient(rng)
        fio2, peep = float(np.round(rng.uniform(0.35, 0.8), 2)), float(rng.integers(5, 15))
        vt, rr = float(np.round(pt.pbw_kg * rng.uniform(6, 8))), float(rng.integers(14, 27))
        k = int(rng.integers(3, 7))
        settings = [vc(float(np.clip(fio2 + d, 0.25, 1.0)), float(np.clip(peep + e, 5, 20)), vt, rr)
                    for d, e in zip(rng.choice([-0.2, -0.1, 0.0, 0.1, 0.2], k), rng.choice([-4, -2, 0, 2, 4], k))]
        model = build_model(pt, true, 10.0)
        if not all(predict(model, s).success for s in settings):
            continue
        trial = vc(float(np.clip(fio2 + rng.choice([-0.1, 0.1]), 0.21, 1.0)), min(peep + 2, 30.0), vt, rr + 2)
        truth = predict(model, trial)
        if not truth.success:
            continue
        try:
            f = fit(pt, [observe(s, true, pt, rng) for s in settings], n_draws=200, seed=len(hits["pao2"]))
        except ValueError:
            continue  # a noisy draw outside the accepted input range
        pred = predict(f.draws, _tile_settings(trial, 200))
        ok = np.asarray(pred.success)
        ranges, _table, _ok = likely_range(f, trial, quantities=("pao2", "paco2"))
        for q in hits:
            lo, hi = np.percentile(np.asarray(getattr(pred.gas, q))[ok], [5, 95])
            t = float(getattr(truth.gas, q))
            hits[q].append(lo <= t <= hi)
            shown[q].append(ranges[q][0] <= t <= ranges[q][1])
    coverage = {q: float(np.mean(v)) for q, v in hits.items()}
    with_error = {q: float(np.mean(v)) for q, v in shown.items()}
    print("several gases: sampler coverage", coverage, "with the model-error term", with_error)
    for q in hits:
        assert 0.84 <= coverage[q] <= 0.96, (q, coverage[q])
        assert with_error[q] >= 0.90, (q, with_error[q])


def point_errors(f, trial, table, truth):
    """Errors of the two candidate point forecasts of one fitted patient after a change, against the truth:
    the fitted estimate's (the number the command line and the window show) and the median of the
    parameter draws' (the middle of the likely range; the ``estimate_atypical`` caution names it).
    PaO2 as |log ratio| x 100 (about %), PaCO2 in mmHg. None where the estimate has no steady state."""
    point = predict(f.model, trial)
    if not point.success:
        return None
    out = {}
    for q, t in truth.items():
        v = np.asarray(table[q], dtype=float)
        m = float(np.median(v[np.isfinite(v)]))
        x = float(getattr(point.gas, q))
        out[q] = (100 * abs(np.log(x / t)), 100 * abs(np.log(m / t))) if q == "pao2" else (abs(x - t), abs(m - t))
    return out


def check_point_forecast(errors, label):
    """The number shown is the fitted estimate's forecast (the posterior mode's), not the draws' median.
    Held to the truth (an independent reference: the generating patient's own steady state), it must be
    at least about as close as the median: its median absolute error at most 1.25 x the median's, for
    PaO2 and PaCO2 (ours: a headline materially worse than the middle of its own range would have to be
    replaced by it). Measured (README's model section): prior-drawn PaO2 4.9 % vs 5.6 %, PaCO2 1.45 vs
    1.44 mmHg; out-of-prior 7.1 % vs 7.7 %, 2.2 vs 2.0 mmHg; the median closer in 47-53 % of cases.
    Patients whose estimate has no steady state at the trial (2 of 200 prior-drawn; the forecast fails with
    its reason) are counted, not silently dropped, and held to at most 2 %; the medians are over the rest."""
    failed = sum(e is None for e in errors)
    assert failed <= 0.02 * len(errors), (label, failed)
    for q in ("pao2", "paco2"):
        e = np.array([x[q] for x in errors if x is not None])
        shown, median = np.median(e[:, 0]), np.median(e[:, 1])
        print(f"{label} point forecast {q}: fitted estimate {shown:.2f}, draws' median {median:.2f} "
              f"(median closer in {100 * np.mean(e[:, 1] < e[:, 0]):.0f} %)")
        assert shown <= 1.25 * median, (label, q, shown, median)


def test_priors_by_condition_follow_the_miget_shapes():
    """MIGET by condition (sources in physiology/fitting/priors.py, from memory): ARDS has the most
    shunt (Dantzker 1979) and recruitable lung (Gattinoni 2006); obstructive lungs little shunt, a wide
    main mode, a low-V/Q mode (Wagner 1977, Rodriguez-Roisin 1989) and the most dead space; after
    anaesthesia modest shunt (Tokics 1987). Unknown: the widest priors."""
    from ventcast.physiology.fitting.priors import CONDITIONS, parameter_names
    pri = {c: population_defaults(Patient(sex="male", height_cm=175, weight_kg=80, condition=c)) for c in CONDITIONS}
    m = {c: p["mean"] for c, p in pri.items()}
    assert m["ards"]["shunt_fixed"] > m["post-operative"]["shunt_fixed"] > m["obstructive"]["shunt_fixed"]
    assert m["ards"]["recruitable"] > m["obstructive"]["recruitable"]
    assert m["obstructive"]["log_sd"] > m["post-operative"]["log_sd"]
    assert m["obstructive"]["dead_space_fraction"] > m["post-operative"]["dead_space_fraction"]
    assert "low_vq_fraction" in parameter_names("obstructive")
    assert all("low_vq_fraction" not in parameter_names(c) for c in ("ards", "post-operative", "other"))
    for c in ("ards", "obstructive", "post-operative"):
        assert pri["other"]["sd"]["shunt_fixed"] >= pri[c]["sd"]["shunt_fixed"]
    with pytest.raises(ValueError, match="condition"):
        population_defaults(Patient(sex="male", height_cm=175, weight_kg=80, condition="asthma"))


def test_rq_prior_covers_fed_and_fasting_icu_patients():
    """McClave 2003 (from memory): RQ mostly 0.7-1.0 in fed or fasting ICU patients, physiological
    0.67-1.3. The prior's 90 % interval lies within 0.65-1.05 and holds 0.7-1.0 at its core."""
    prior = population_defaults(PT)
    lo, hi = (prior["mean"]["rq"] * np.exp(k * 1.645 * prior["sd"]["rq"]) for k in (-1, 1))
    assert 0.65 <= lo <= 0.72 and 0.95 <= hi <= 1.05


def test_end_tidal_co2_cannot_drive_vco2_to_impossible_values():
    """The copd-trapping demo (PaCO2 68, PetCO2 45 mmHg, VE 10.5 L/min): the fitted RQ lies within the
    physiological 0.65-1.2 (McClave 2003, from memory); with PetCO2 read as mean alveolar gas and VCO2
    free, it was 1.66. The dead space takes the gap instead."""
    from ventcast.app import casefile, engine
    _p, _o, res = engine.fit_case(casefile.load_demo("copd-trapping"))
    assert 0.65 <= res.estimates["rq"] <= 1.2
    assert not any("respiratory quotient" in w for w in res.warnings)
    assert res.estimates["dead_space_fraction"] > 0.3


def test_an_impossible_rq_is_named():
    """McClave 2003 (from memory): an RQ outside 0.67-1.3 points to a measurement error; the fit names a
    fitted RQ outside 0.65-1.2 with its value and what to check, and stays quiet inside."""
    from ventcast.physiology.fitting.fit import rq_warning
    assert rq_warning(0.85) == "" and rq_warning(0.65) == "" and rq_warning(1.2) == ""
    for rq in (0.6, 1.35):
        w = rq_warning(rq)
        assert f"{rq:.2f}" in w and "McClave" in w and "0.65-1.2" in w


def test_sampler_mechanics_tolerance_moves_the_gases_by_under_one_percent_of_their_sd():
    """The sampler's densities solve the mechanics loop to SAMPLER_MECHANICS_TOL: over 2,000 patients drawn
    from the priors at random settings, PaO2, PaCO2 and pH differ from the forecasts' tolerance by under 1 %
    of the smallest measurement SD of each (physiology.measurement), and the same cases succeed."""
    from ventcast.physiology.fitting.fit import SAMPLER_MECHANICS_TOL
    from ventcast.physiology.measurement import SD

    rng = np.random.default_rng(8)
    n = 2000
    prior = population_defaults(PT)
    values = {k: _from_z(k, rng.normal(_to_z(k, prior["mean"][k]), prior["sd"][k], n)) for k in PARAMETERS}
    values["vco2"] = values["rq"] * values["vo2"]
    model = build_model(PT, values, 10.0)
    settings = Settings(mode="volume", fio2=rng.uniform(0.3, 0.9, n), peep=rng.uniform(5, 16, n),
                        vt_ml=rng.uniform(320, 480, n), rr=rng.uniform(14, 28, n), ti=rng.uniform(0.7, 1.0, n))
    exact = predict(model, settings)
    loose = predict(model, settings, mechanics_tol=SAMPLER_MECHANICS_TOL)
    assert np.array_equal(exact.success, loose.success) and exact.success.mean() > 0.9
    ok = exact.success
    for q in ("pao2", "paco2", "ph"):
        assert np.max(np.abs(getattr(exact.gas, q)[ok] - getattr(loose.gas, q)[ok])) < 0.01 * SD[q][0], q


def test_a_stopped_sampler_gives_up_and_never_returns_draws():
    """A sampler whose stop check turns True (the window asked for newer draws) raises SamplerStopped at its
    next step; it does not return draws (not even the estimate repeated, which a failed sampler returns)."""
    from ventcast.physiology.fitting.fit import SamplerStopped, sample_posterior
    estimate = fit(PT, [observe(vc(0.5, 10))], sample=False)
    calls = []

    def stop():
        calls.append(1)
        return len(calls) > 3
    with pytest.raises(SamplerStopped):
        sample_posterior(estimate, stop)
    assert len(calls) == 4
    assert sample_posterior(estimate, lambda: False).draws is not None


def test_the_problem_transforms_all_columns_as_from_z_does_one():
    """The sampler's batched inverse transform (``_Problem.values``) against ``_from_z`` applied column by
    column, for every condition's parameters, on values inside, at and far past each bound; and the
    population means it holds are the ones ``build_model`` would look up itself."""
    from ventcast.physiology.fitting.fit import _Problem
    from ventcast.physiology.fitting.priors import parameter_names

    rng = np.random.default_rng(3)
    for condition in ("ards", "obstructive", "post-operative", "other"):
        pt = Patient(sex="male", height_cm=178, weight_kg=80, hb_g_dl=12.0, condition=condition)
        free = tuple(n for n in parameter_names(condition) if n != "anatomic_dead_space")
        obs = Observation(settings=vc(0.5, 8), pao2=80.0, paco2=42.0, ph=7.38)
        prob = _Problem(pt, [obs], free, {"anatomic_dead_space": 150.0}, population_defaults(pt))
        Z = np.concatenate([rng.normal(0.0, 3.0, (300, len(free))), np.full((1, len(free)), 40.0),
                            np.full((1, len(free)), -40.0), np.zeros((1, len(free)))])
        vals = prob.values(Z)
        for j, n in enumerate(free):
            assert np.array_equal(vals[n], _from_z(n, Z[:, j])), (condition, n)
        assert np.all(vals["anatomic_dead_space"] == 150.0)
        assert prob.prior_mean == population_defaults(pt)["mean"]


def test_compiled_forward_model_gives_predicts_numbers():
    """Independent calculation: the fit's compiled forward model (physiology/fitting/_forward.py, a second
    form of breathe -> predict -> the lung solve kept for speed) against ``predict`` itself, on draws
    spread wider than every condition's priors, observations in volume and pressure control with every
    observed quantity, at the sampler's and the optimiser's tolerances, on both unit grids, cold and warm
    started: the same cases fail, the rest agree within 1e-6 (mmHg, cmH2O, mL, pH units) and so do the
    warm-start states and PetCO2 gaps. A changed equation on one side only, or a stale numba cache of
    _forward.py, fails it."""
    from ventcast.physiology.fitting.fit import SAMPLER_TOL, _Problem
    from ventcast.physiology.fitting.priors import parameter_names

    rng = np.random.default_rng(11)
    failures = 0
    for condition in ("ards", "obstructive", "post-operative", "other"):
        pt = Patient(sex="female", height_cm=160, weight_kg=70, hb_g_dl=9.5, temperature_c=38.3,
                     barometric_mmhg=720, condition=condition)
        pc = Settings(mode="pressure", fio2=0.45, peep=12, inspiratory_pressure=16, rr=24, ti=0.8)
        observations = [
            Observation(settings=vc(0.5, 8, vt=380), pao2=85.0, paco2=44.0, ph=7.36, petco2=36.0, pplat=24.0,
                        ppeak=33.0, vte_ml=375.0, ve_l_min=7.5, cardiac_output=5.0),
            Observation(settings=Settings(mode="volume", fio2=0.8, peep=14, vt_ml=420, rr=18, ti=1.0, pause=0.2),
                        pao2=130.0, paco2=47.0, ph=7.33, vco2=220.0),
            Observation(settings=pc, pao2=90.0, paco2=50.0, ph=7.30, sao2=0.95, petco2=40.0, ppeak=28.0,
                        vte_ml=400.0),
            # zero PEEP, a low mean airway pressure: a high cardiac output reaches the lung's 20 L/min clip
            Observation(settings=Settings(mode="volume", fio2=0.3, peep=0, vt_ml=300, rr=8, ti=0.6),
                        pao2=70.0, paco2=45.0, ph=7.35, cardiac_output=6.0),
        ]
        free = parameter_names(condition)
        prob = _Problem(pt, observations, free, {}, population_defaults(pt))
        Z = prob.pm + rng.standard_normal((150, len(free))) * prob.ps * 1.5
        # and draws at the parameters' bounds (cardiac output below 1 or above 20 L/min, the clips, failures)
        Z = np.concatenate([Z, prob.pm + rng.choice([-8.0, 8.0], (30, len(free))) * prob.ps])
        for units, tol in (("coarse", SAMPLER_TOL), ("full", 1e-4)):
            start = None
            for Zs in (Z, Z + rng.normal(0.0, 0.05, Z.shape)):
                ref = prob.model_outputs(Zs, start, tol, units, compiled=False)
                ref_states, ref_gap = prob.states, prob._gap
                got = prob.model_outputs(Zs, start, tol, units, compiled=True)
                assert np.array_equal(np.isfinite(ref), np.isfinite(got)), (condition, units)
                ok = np.isfinite(ref)
                assert np.max(np.abs(ref[ok] - got[ok])) < 1e-6, (condition, units)
                assert np.max(np.abs(ref_gap - prob._gap)) < 1e-6
                for mode, st in ref_states.items():
                    for k, v in st.items():
                        w = prob.states[mode][k]
                        assert np.array_equal(np.isfinite(v), np.isfinite(w)), (condition, mode, k)
                        assert np.nanmax(np.abs(v - w)) < 1e-6, (condition, mode, k)
                failures += int((~ok).any(axis=1).sum())
                start = ref_states  # the second round starts warm, from the first's solved states
    assert failures > 0  # the failure rules were exercised
    # The patient's numbers are refused as predict refuses them, before any draw.
    with pytest.raises(ValueError, match="hb"):
        _Problem(Patient(sex="male", height_cm=175, weight_kg=70, hb_g_dl=2.0), observations, free, {},
                 population_defaults(pt))
