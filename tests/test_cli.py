"""The ventcast command line: predict/fit JSON contract, and a catalogue of bad input."""

import copy
import hashlib
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from ventcast.app import casefile
from ventcast.app.cli import main

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def predict_json():
    out = subprocess.run([sys.executable, "-m", "ventcast", "predict", "--demo", "ards-moderate", "--set",
                          "peep_cmh2o=12", "--format", "json"], capture_output=True, text=True, cwd=ROOT)
    assert out.returncode == 0, out.stderr
    return json.loads(out.stdout)


NUM = (int, float)
SCHEMA = {
    "settings": {"mode": str, "fio2": NUM, "peep_cmh2o": NUM, "rr_per_min": NUM, "inspiratory_time_s": NUM},
    "now": {"pf_ratio_mmhg": NUM, "aa_gradient_mmhg": NUM, "alveolar_po2_mmhg": NUM, "pbw_kg": NUM,
            "vt_ml_per_kg_pbw": NUM, "driving_pressure_cmh2o": NUM, "compliance_ml_per_cmh2o": NUM,
            "mechanical_power_j_min": NUM, "ventilatory_ratio": NUM, "oxygenation_index": NUM,
            "berlin_category": str, "base_excess_mmol_l": NUM},
    "fit": {"success": bool, "message": str, "shunt_fraction": NUM, "vq_log_sd": NUM,
            "alveolar_dead_space_fraction": NUM, "vco2_ml_min": NUM, "vo2_ml_min": NUM,
            "cardiac_output_l_min": NUM, "alveolar_ventilation_l_min": NUM, "hb_g_dl": NUM, "identifiability": list},
    "steady": {k: NUM for k in ("pao2_mmhg", "paco2_mmhg", "ph", "sao2", "petco2_mmhg", "vd_vt", "shunt_fraction",
                                "pplat_cmh2o", "ppeak_cmh2o", "driving_pressure_cmh2o", "mean_airway_pressure_cmh2o",
                                "intrinsic_peep_cmh2o", "mechanical_power_j_min", "vt_ml_per_kg_pbw", "pf_ratio_mmhg",
                                "cardiac_output_l_min", "minute_ventilation_l_min", "alveolar_ventilation_l_min")},
    "likely_range": {k: list for k in ("pao2_mmhg", "paco2_mmhg", "ph", "sao2")},
    "course": {k: list for k in ("minutes", "pao2_mmhg", "paco2_mmhg", "ph", "sao2", "pao2_low", "pao2_high",
                                 "paco2_low", "paco2_high")},
}


def test_predict_json_keys_and_types(predict_json):
    for block, keys in SCHEMA.items():
        assert block in predict_json, block
        for key, typ in keys.items():
            assert isinstance(predict_json[block][key], typ), (block, key)
    assert isinstance(predict_json["recheck_after_min"], NUM)
    assert isinstance(predict_json["alerts"], list)
    for a in predict_json["alerts"]:
        assert set(a) == {"code", "severity", "message"} and a["severity"] in ("info", "caution", "danger")
    assert "not a medical device" in predict_json["caution"]
    assert predict_json["settings"]["peep_cmh2o"] == 12
    for lo, hi in predict_json["likely_range"].values():
        assert lo <= hi
    c = predict_json["course"]
    assert c["minutes"][0] == 0 and c["minutes"][-1] == 60
    assert max(b - a for a, b in zip(c["minutes"], c["minutes"][1:])) <= 0.25 + 1e-9
    assert len(c["pao2_mmhg"]) == len(c["minutes"]) == len(c["pao2_low"])


def test_predict_fit_block_lets_a_reviewer_recompute(predict_json):
    """The fit block gives the lung at the current settings; the steady block the trial."""
    f = predict_json["fit"]
    assert 0 < f["shunt_fraction"] < 0.8 and f["cardiac_output_l_min"] > 1
    s = predict_json["steady"]
    lo, hi = predict_json["likely_range"]["pao2_mmhg"]
    assert lo - 1 <= s["pao2_mmhg"] <= hi + 1


def test_predict_table_ends_with_caution():
    out = subprocess.run([sys.executable, "-m", "ventcast", "predict", "--demo", "postop-wean", "--set", "fio2=0.35"],
                         capture_output=True, text=True, cwd=ROOT)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip().splitlines()[-1].startswith("Caution: model estimate")
    assert "PaO2" in out.stdout and "likely range" in out.stdout


def test_fit_command(capsys):
    assert main(["fit", "--demo", "refractory-shunt", "--format", "json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["fit"]["shunt_fraction"] > 0.25  # a high-shunt case
    # The constants that set how PaCO2 answers a higher Pplat are fitted (drawn), and shown with their ranges,
    # so that a PEEP forecast's PaCO2 can be traced to them.
    f = data["fit"]
    for key, rkey in (("upper_inflection_cmh2o", "inflection"),
                      ("overdistension_dead_space_fraction", "overdistension_dead_space"),
                      ("anatomic_dead_space_ml", "anatomic_dead_space")):
        lo, hi = f["likely_range"][rkey]
        assert 0 < lo < hi and f[key] > 0, key
    assert main(["fit", "--demo", "copd-trapping"]) == 0
    text = capsys.readouterr().out
    for label in ("upper inflection [cmH2O]", "overdistension dead space", "below the Y-piece [mL]"):
        line = next(x for x in text.splitlines() if label in x)
        assert "likely range" in line, line


def _case_text():
    return casefile.demo_text("ards-moderate")


def _mutate(fn):
    doc = json.loads(_case_text())
    fn(doc)
    return json.dumps(doc)


def _set(path, value):
    def fn(doc):
        node = doc
        for p in path[:-1]:
            node = node[p]
        node[path[-1]] = value
    return fn


def _delete(path):
    def fn(doc):
        node = doc
        for p in path[:-1]:
            node = node[p]
        del node[path[-1]]
    return fn


BAD_CASES = [
    ("fio2 1.5", _set(["settings", "fio2"], 1.5), "settings.fio2"),
    ("fio2 as percent", _set(["settings", "fio2"], 60), "did you mean 0.60"),
    ("fio2 below air", _set(["settings", "fio2"], 0.1), "settings.fio2"),
    ("fio2 string", _set(["settings", "fio2"], "0.6"), "settings.fio2"),
    ("peep negative", _set(["settings", "peep_cmh2o"], -2), "settings.peep_cmh2o"),
    ("peep 35", _set(["settings", "peep_cmh2o"], 35), "settings.peep_cmh2o"),
    ("rr zero", _set(["settings", "rr_per_min"], 0), "settings.rr_per_min"),
    ("rr 80", _set(["settings", "rr_per_min"], 80), "settings.rr_per_min"),
    ("ti too long", _set(["settings", "inspiratory_time_s"], 3.5), "no time to breathe out"),
    ("vt tiny", _set(["settings", "vt_ml"], 60), "settings.vt_ml"),
    ("vt huge", _set(["settings", "vt_ml"], 1500), "settings.vt_ml"),
    ("vt missing in volume", _set(["settings", "vt_ml"], None), "required in volume mode"),
    ("mode unknown", _set(["settings", "mode"], "jet"), "settings.mode"),
    ("pressure mode without pinsp", _set(["settings", "mode"], "pressure"), "inspiratory_pressure_cmh2o"),
    ("pinsp 60", lambda d: (d["settings"].update(mode="pressure", inspiratory_pressure_cmh2o=60)), "inspiratory_pressure"),
    ("apparatus dead space negative", _set(["settings", "apparatus_dead_space_ml"], -5), "apparatus_dead_space_ml"),
    ("unknown settings key", _set(["settings", "pmax"], 40), "unknown key 'pmax'"),
    ("unknown top key", _set(["colour"], "red"), "unknown key 'colour'"),
    ("unknown observation key", _set(["observations", 0, "lactate"], 2.0), "unknown key 'lactate'"),
    ("missing patient", _delete(["patient"]), "patient"),
    ("missing height", _delete(["patient", "height_cm"]), "patient.height_cm"),
    ("height 80 cm", _set(["patient", "height_cm"], 80), "patient.height_cm"),
    ("sex unknown", _set(["patient", "sex"], "x"), "patient.sex"),
    ("hb 30", _set(["patient", "hb_g_dl"], 30), "patient.hb_g_dl"),
    ("temperature 45", _set(["patient", "temperature_c"], 45), "patient.temperature_c"),
    ("no observations", _set(["observations"], []), "observations"),
    ("pao2 missing", _delete(["observations", 1, "pao2_mmhg"]), "observations[1].pao2_mmhg"),
    ("pao2 negative", _set(["observations", 1, "pao2_mmhg"], -4), "observations[1].pao2_mmhg"),
    ("pao2 nan-like string", _set(["observations", 1, "pao2_mmhg"], "NaN"), "observations[1].pao2_mmhg"),
    ("pao2 impossible at fio2", _set(["observations", 1, "pao2_mmhg"], 600), "impossible at FiO2"),
    ("paco2 300", _set(["observations", 1, "paco2_mmhg"], 300), "observations[1].paco2_mmhg"),
    ("ph 9", _set(["observations", 1, "ph"], 9.0), "observations[1].ph"),
    ("sao2 as percent", _set(["observations", 1, "sao2"], 92), "did you mean 0.92"),
    ("pplat negative", _set(["observations", 1, "pplat_cmh2o"], -1), "observations[1].pplat_cmh2o"),
    ("bad timestamp", _set(["observations", 1, "taken_at"], "yesterday"), "observations[1].taken_at"),
    ("observation fio2 percent", _set(["observations", 0, "settings", "fio2"], 50), "observations[0].settings.fio2"),
    ("wrong format", _set(["format"], "other.case"), "format"),
    ("newer version", _set(["version"], 9), "newer Ventcast"),
    ("version string", _set(["version"], "1"), "version"),
    ("label too long", _set(["label"], "x" * 500), "label"),
    ("hco3 inconsistent", _set(["observations", 1, "hco3_mmol_l"], 35), "Henderson-Hasselbalch"),
]


def _hash(path):
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


@pytest.mark.parametrize("name,mutation,needle", BAD_CASES, ids=[b[0] for b in BAD_CASES])
def test_bad_case_exits_2_names_the_field_and_changes_nothing(tmp_path, capsys, name, mutation, needle):
    path = tmp_path / "case.ventcast.json"
    path.write_text(_mutate(mutation))
    before = _hash(path)
    code = main(["predict", str(path), "--format", "json"])
    err = capsys.readouterr().err
    assert code == 2, err
    assert needle in err
    assert "Traceback" not in err
    assert _hash(path) == before


RAW_BAD = [
    ("truncated json", lambda: _case_text()[:200], "not valid JSON"),
    ("not an object", lambda: "[1, 2, 3]", "JSON object"),
    ("empty file", lambda: "", "not valid JSON"),
    ("binary", lambda: "\x00\x01\x02", "not valid JSON"),
]


@pytest.mark.parametrize("name,text,needle", RAW_BAD, ids=[b[0] for b in RAW_BAD])
def test_raw_bad_files(tmp_path, capsys, name, text, needle):
    path = tmp_path / "case.ventcast.json"
    path.write_text(text())
    assert main(["predict", str(path)]) == 2
    assert needle in capsys.readouterr().err


def test_ten_megabyte_file_is_refused(tmp_path, capsys):
    path = tmp_path / "big.ventcast.json"
    path.write_text(" " * 10_000_000 + _case_text())
    assert main(["predict", str(path)]) == 2
    assert "at most" in capsys.readouterr().err


@pytest.mark.parametrize("args,needle", [
    (["--set", "peep=12"], "key 'peep' is not a setting"),
    (["--set", "peep_cmh2o=twelve"], "not a number"),
    (["--set", "peep_cmh2o"], "KEY=VALUE"),
    (["--set", "fio2=70"], "did you mean 0.70"),
    (["--set", "rr_per_min=nan"], "finite"),
    (["--minutes", "0"], "--minutes"),
])
def test_bad_set_values(capsys, args, needle):
    assert main(["predict", "--demo", "ards-moderate", *args]) == 2
    assert needle in capsys.readouterr().err


def test_missing_file_and_no_case(capsys, tmp_path):
    assert main(["predict", str(tmp_path / "none.ventcast.json")]) == 2
    assert "cannot read" in capsys.readouterr().err
    assert main(["predict"]) == 2
    assert "case file is required" in capsys.readouterr().err


def test_atomic_save_leaves_no_partial_file(tmp_path):
    case = casefile.load_demo("ards-moderate")
    target = tmp_path / "saved.ventcast.json"
    casefile.save(target, case)
    assert casefile.load(target)["label"] == case["label"]
    bad = copy.deepcopy(case)
    bad["settings"]["fio2"] = 3.0
    before = target.read_bytes()
    with pytest.raises(casefile.CaseError):
        casefile.save(target, bad)
    assert target.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["saved.ventcast.json"]


def test_course_band_leaves_out_draws_it_cannot_follow(monkeypatch):
    """A draw whose course cannot be integrated is found by halving the batch and left out (and counted),
    instead of losing the whole band."""
    import numpy as np
    from ventcast.app import engine
    from ventcast.physiology.dynamics import course as course_module

    case = casefile.load_demo("ards-moderate")
    _p, _o, result = engine.fit_case(case)
    current = engine.to_settings(case["settings"])
    trial = engine.to_settings(engine.apply_sets(case, ["peep_cmh2o=12"]))
    bad_shunt = float(np.asarray(result.draws.shunt_fixed)[7])
    real = course_module.simulate
    _o2, _co2, _sa, _ph, left_before = engine._band(result, current, trial, 60.0)  # draws the model itself cannot follow

    def flaky(draws, *args, **kwargs):
        c = real(draws, *args, **kwargs)
        if np.any(np.isclose(np.atleast_1d(draws.shunt_fixed), bad_shunt)):
            return course_module._failed(c.final, "the time-course integration failed (test)")
        return c

    monkeypatch.setattr(engine, "simulate", flaky)
    pao2, paco2, _sao2, _ph, left_out = engine._band(result, current, trial, 60.0)
    # Resampled draws can repeat: every copy of the failing draw is left out, besides those left out before.
    copies = int(np.sum(np.isclose(np.asarray(result.draws.shunt_fixed), bad_shunt)))
    assert left_before < left_out <= left_before + copies
    assert pao2.shape == paco2.shape and pao2.shape[0] == 200 - left_out


def test_recheck_time_is_set_by_pao2_not_by_an_unmeasurable_paco2_drift(capsys):
    """FiO2 0.6 -> 1.0 in the ARDS demo: PaCO2 drifts by well under one measurement SD (Haldane
    effect), so the re-check time is PaO2's 90 % time, minutes, not a quarter of an hour."""
    assert main(["predict", "--demo", "ards-moderate", "--set", "fio2=1.0", "--format", "json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["recheck_after_min"] is not None and 0.5 < out["recheck_after_min"] < 10.0
    paco2 = out["course"]["paco2_mmhg"]
    assert abs(paco2[-1] - paco2[0]) < 1.5 + 0.02 * paco2[0]  # one measurement SD (physiology.measurement)


def test_recheck_advice_never_falls_below_the_step_down_floor(capsys):
    """After an FiO2 decrease the model's PaO2 settles within a minute or two, faster than patients'
    (Cakar 2001: k 0.69 +/- 0.42 /min after a fall, about half the change left after 1 min): the advice
    is the step-down plan's floor, 10 min (a gas 10-30 min after a change is common practice; Cakar 1998
    found 10 min adequate), and says the model's own time beside it. A slower model course (a PEEP step
    with recruitment and CO2 stores) is advised as it is."""
    from ventcast.physiology.planning.stepdown import HOLD_FLOOR_MIN

    assert main(["predict", "--demo", "postop-wean", "--set", "fio2=0.35", "--format", "json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["recheck_after_min"] < HOLD_FLOOR_MIN and out["recheck_advised_min"] == HOLD_FLOOR_MIN
    assert main(["predict", "--demo", "postop-wean", "--set", "fio2=0.35"]) == 0
    text = capsys.readouterr().out
    assert f"after about {HOLD_FLOOR_MIN:.0f} min at the earliest" in text
    assert f"within about {max(out['recheck_after_min'], 1):.0f} min" in text and "Cakar 2001" in text
    assert main(["predict", "--demo", "ards-moderate", "--set", "peep_cmh2o=14", "--format", "json"]) == 0
    slow = json.loads(capsys.readouterr().out)
    assert slow["recheck_after_min"] > HOLD_FLOOR_MIN and slow["recheck_advised_min"] == slow["recheck_after_min"]


@pytest.mark.parametrize("sets", [["vt_ml=700"], ["peep_cmh2o=24"]])
def test_a_trial_beyond_the_lungs_capacity_is_refused_with_the_plateau_it_would_need(capsys, sets):
    """VT 700 mL or PEEP 24 in the ARDS demo: the fitted lung cannot take the volume. That is the input's
    limit, not a failure of the fit: exit 2, naming the top of the pressure-volume curve."""
    args = ["predict", "--demo", "ards-moderate"]
    for s in sets:
        args += ["--set", s]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert "beyond the fitted lung's capacity" in err and "plateau pressure above" in err and "cmH2O" in err
    assert "Traceback" not in err


def test_predict_states_the_model_assumptions_and_labels_driving_pressure(capsys):
    """The passive-patient assumption and the condition are stated with every forecast; driving pressure
    says which PEEP it uses; the Berlin category is given for ARDS only (Berlin definition 2012)."""
    assert main(["predict", "--demo", "copd-trapping", "--set", "fio2=0.5"]) == 0
    out = capsys.readouterr().out
    assert "passive patient" in out and "obstructive" in out and "flow limitation" in out
    assert "Driving pressure (Pplat - total PEEP)" in out
    assert main(["fit", "--demo", "copd-trapping", "--format", "json"]) == 0
    fit_out = json.loads(capsys.readouterr().out)
    assert fit_out["now"]["berlin_category"].startswith("not graded")
    assert 0.65 <= fit_out["fit"]["respiratory_quotient"] <= 1.2
    assert main(["fit", "--demo", "ards-moderate", "--format", "json"]) == 0
    assert json.loads(capsys.readouterr().out)["now"]["berlin_category"] == "moderate"


def test_a_peep_induced_paco2_rise_has_a_range_that_admits_no_change(capsys):
    """ARDS demo, PEEP 10 -> 14: the overdistension inflection and its dead space are uncertain (fitted with
    priors, not fixed), so the PaCO2 forecast's likely range reaches down to today's PaCO2 instead of
    excluding "no change" (it was [53.6, 60.7] around a model PaCO2 of 51.9 when both were fixed)."""
    assert main(["predict", "--demo", "ards-moderate", "--set", "peep_cmh2o=14", "--format", "json"]) == 0
    out = json.loads(capsys.readouterr().out)
    lo, hi = out["likely_range"]["paco2_mmhg"]
    assert lo <= out["course"]["paco2_mmhg"][0] <= hi


def test_a_fit_is_remembered_for_the_same_data_only():
    """The same patient and observations give the same (identical) fit at once; any changed value, an
    estimate-only fit completed later, or a new case gives its own."""
    from ventcast.app import engine
    from ventcast.physiology.fitting.fit import sample_posterior

    case = casefile.load_demo("copd-trapping")
    _p, _o, first = engine.fit_case(case)
    _p, _o, again = engine.fit_case(copy.deepcopy(case))
    assert again is first
    changed = copy.deepcopy(case)
    changed["observations"][-1]["paco2_mmhg"] += 1.0
    _p, _o, other = engine.fit_case(changed)
    assert other is not first and other.estimates != first.estimates
    # an estimate-only fit of remembered data is the complete one; sample_fit of a new estimate stores it
    _p, _o, estimate = engine.fit_case(case, sample=False)
    assert estimate is first
    engine._FITS.clear()
    _p, _o, estimate = engine.fit_case(case, sample=False)
    assert not estimate.sampled
    done = engine.sample_fit(estimate)
    assert np.array_equal(done.draws.shunt_fixed, sample_posterior(estimate).draws.shunt_fixed)
    assert engine.fit_case(case)[2] is done


def test_saved_trials_are_checked_like_settings():
    """A case file's trials (saved from the window) are checked like the settings: a bad one is refused
    with its field, value and accepted range; the command line forecasts from the settings, not them."""
    case = casefile.load_demo("ards-moderate")
    doc = {**case, "trials": {"A": dict(case["settings"], peep_cmh2o=14), "B": None, "C": None}}
    out = casefile.validate(doc)
    assert out["trials"]["A"]["peep_cmh2o"] == 14 and out["trials"]["B"] is None
    bad = {**case, "trials": {"A": dict(case["settings"]), "B": dict(case["settings"], vt_ml=1500)}}
    with pytest.raises(casefile.CaseError) as err:
        casefile.validate(bad)
    assert err.value.field == "trials.B.vt_ml" and "1500" in str(err.value) and "1139" in str(err.value)
    with pytest.raises(casefile.CaseError, match="trials"):
        casefile.validate({**case, "trials": {"B": dict(case["settings"])}})  # Trial A is required


def test_version_and_help_name_every_set_key_with_its_range(capsys):
    """Issue 17: `ventcast --version`; the --set help lists every settings key with the accepted range the
    code enforces (the README and --help agree)."""
    from ventcast.app import version
    with pytest.raises(SystemExit) as done:
        main(["--version"])
    assert done.value.code == 0 and capsys.readouterr().out.strip() == f"ventcast {version()}"
    with pytest.raises(SystemExit):
        main(["predict", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    for key, (lo, hi, unit) in casefile.SETTING_RANGES.items():
        assert f"{key} ({lo:g}-{hi:g} {unit})" in text, key
    assert "fio2 (0.21-1.0)" in text and "vt_ml (2-20 mL/kg PBW" in text


def test_a_forecast_outside_its_own_range_is_said(capsys):
    """The point forecast (fitted estimate) and the likely range (posterior draws) can disagree: COPD demo,
    PEEP 5 -> 8 cmH2O gave PaCO2 77.3 mmHg with a range of 61.8-75.4. Whenever the forecast lies outside its
    range, an alert says so in words (never silently)."""
    assert main(["predict", "--demo", "copd-trapping", "--set", "peep_cmh2o=8", "--format", "json"]) == 0
    out = json.loads(capsys.readouterr().out)
    flagged = {a["message"].split()[1] for a in out["alerts"] if a["code"] == "estimate_outside_range"}
    for key, name in (("pao2_mmhg", "PaO2"), ("paco2_mmhg", "PaCO2")):
        lo, hi = out["likely_range"][key]
        assert (name in flagged) == (not lo <= out["steady"][key] <= hi), (name, out["steady"][key], lo, hi)


def test_outputs_use_one_rounding_rule(capsys):
    """Issue 17, item 10: every single value in the JSON is at its clinical precision (app.precision),
    the same as the text: PaO2 and P/F whole mmHg, PaCO2 0.1, pH 0.01, SaO2 0.01 (whole %), pressures 0.1
    (common practice); the text prints the same values."""
    assert main(["predict", "--demo", "ards-moderate", "--set", "peep_cmh2o=12", "--format", "json"]) == 0
    out = json.loads(capsys.readouterr().out)

    def decimals(x):
        text = repr(float(x))
        return 0 if text.endswith(".0") else len(text.split(".")[1])

    for block, key, most in (("now", "pf_ratio_mmhg", 0), ("steady", "pao2_mmhg", 0), ("steady", "paco2_mmhg", 1),
                             ("steady", "ph", 2), ("steady", "sao2", 2), ("steady", "pplat_cmh2o", 1),
                             ("steady", "driving_pressure_cmh2o", 1), ("fit", "vco2_ml_min", 0)):
        assert decimals(out[block][key]) <= most, (block, key, out[block][key])
    assert all(decimals(x) <= 0 for x in out["likely_range"]["pao2_mmhg"])
    assert main(["predict", "--demo", "ards-moderate", "--set", "peep_cmh2o=12"]) == 0
    text = capsys.readouterr().out
    st = out["steady"]
    assert f"{st['pao2_mmhg']:.0f} mmHg" in text and f"{100 * st['sao2']:.0f} %" in text
    dp = [a["message"] for a in out["alerts"] if a["code"] == "driving_pressure_high"]
    assert dp and f"driving pressure {st['driving_pressure_cmh2o']:.1f} cmH2O" in dp[0]


def test_readiness_values_are_judged_as_shown():
    """A readiness value is rounded to its shown precision before it is judged: pH 7.246 reads 7.25 and
    meets "pH at least 7.25" (MacIntyre 2001), never "7.25 - not met"."""
    from types import SimpleNamespace

    from ventcast.physiology.planning.stepdown import readiness

    pred = SimpleNamespace(gas=SimpleNamespace(ph=7.2496, pf_ratio=149.6, sao2=0.905))
    settings = SimpleNamespace(fio2=0.4, peep=8.0, rr=20.0)
    rows = {r["criterion"]: r for r in readiness(pred, settings, spontaneous_rr=30, spontaneous_vt_ml=285.0)}
    ph = next(r for k, r in rows.items() if "pH" in k)
    pf = next(r for k, r in rows.items() if "P/F" in k)
    rsbi = next(r for k, r in rows.items() if "RSBI" in k)
    assert (ph["value"], ph["met"]) == (7.25, True)
    assert (pf["value"], pf["met"]) == (150.0, True)
    assert rsbi["value"] == 105.0 and rsbi["met"] is False  # 30 / 0.285 = 105.3: "below 105" not met


def test_an_option_met_by_pao2_alone_says_so():
    """ARDS Network 2000: the oxygenation goal is PaO2 55-80 mmHg or SpO2 88-95 %. An option whose SpO2 margin
    is negative while its PaO2 margin is not meets the goal, and the text says by which."""
    from ventcast.app.cli import oxygenation_either_text

    text = oxygenation_either_text({"spo2": -0.02, "pao2_mmhg": 9.0, "ph": 0.03})
    assert "met by PaO2" in text and "SpO2 outside its range" in text and "ARDS Network 2000" in text
    assert "met by SpO2" in oxygenation_either_text({"spo2": 0.01, "pao2_mmhg": -3.0})
    assert oxygenation_either_text({"spo2": 0.01, "pao2_mmhg": 3.0}) == ""
    assert oxygenation_either_text({"spo2": -0.01, "pao2_mmhg": -3.0}) == ""
    assert oxygenation_either_text({"spo2": -0.01}) == ""


def test_a_forecast_beyond_most_of_its_draws_names_their_median():
    """The point forecast comes from the fitted estimate (the posterior mode of 13 parameters), which can
    sit far from the middle of what the data allow while staying inside the 90 % range: on the COPD demo,
    PEEP 5 -> 8 cmH2O gives PaCO2 77.3 mmHg from the estimate against a median of about 67 over the draws
    (measured). Whenever the estimate lies beyond the draws' quartiles but inside its range, a caution
    names the share of draws it exceeds and their median; otherwise there is none (checked against the
    draws recomputed here)."""
    from ventcast.app import engine
    from ventcast.physiology.fitting.fit import likely_range

    for demo, sets in (("copd-trapping", ["peep_cmh2o=8"]), ("postop-wean", ["fio2=0.3"])):
        case = casefile.load_demo(demo)
        _p, _o, result = engine.fit_case(case)
        trial = engine.apply_sets(case, sets)
        out = engine.forecast_fitted(case, result, trial, with_course=False, with_band=False, with_next=False)
        ranges, table, _ok = likely_range(result, engine.to_settings(trial), ("pao2", "paco2"))
        flagged = {a["message"].split()[1]: a["message"] for a in out["alerts"] if a["code"] == "estimate_atypical"}
        for key, q, name, digits in (("pao2_mmhg", "pao2", "PaO2", 0), ("paco2_mmhg", "paco2", "PaCO2", 1)):
            v = table[q][np.isfinite(table[q])]
            x = out["steady"][key]
            share = float(np.mean(v < x))
            lo, hi = out["likely_range"][key]
            expected = lo <= x <= hi and not 1 - engine.ATYPICAL_SHARE <= share <= engine.ATYPICAL_SHARE
            assert (name in flagged) == expected, (demo, name, x, share)
            if expected:
                assert f"their median {np.median(v):.{digits}f} mmHg" in flagged[name]
        if demo == "copd-trapping":
            assert "PaCO2" in flagged and "higher than" in flagged["PaCO2"]
