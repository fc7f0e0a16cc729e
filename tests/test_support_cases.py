"""Cases on pressure support and CPAP, end to end: the case file, the forecast with its two bounds, the
step-down of support, the refusals, and the window."""

import copy
import json

import pytest

from ventcast.app import engine
from ventcast.app.casefile import CaseError, dumps, load_demo, validate
from ventcast.app.cli import main
from ventcast.physiology.planning.support import PH_MIN, RATE_MAX
from ventcast.physiology.mechanics.spontaneous import PMUS_EXCESSIVE, RSBI_FAILURE

DEMO = "support-trial"


def _case(**changes):
    doc = json.loads(dumps(load_demo(DEMO)))
    for path, value in changes.items():
        where = doc
        keys = path.split(".")
        for k in keys[:-1]:
            where = where[int(k)] if k.isdigit() else where[k]
        if value is None:
            where.pop(keys[-1], None)
        else:
            where[keys[-1]] = value
    return doc


def test_the_support_demo_is_a_version_3_case_with_effort_measurements():
    case = load_demo(DEMO)
    assert case["settings"]["mode"] == "pressure-support" and case["settings"]["pressure_support_cmh2o"] == 12
    obs = case["observations"][-1]
    assert obs["delta_pocc_cmh2o"] < 0 and obs["p01_cmh2o"] > 0 and obs["spontaneous_rr_per_min"] > 0
    assert json.loads(dumps(case))["version"] == 3


@pytest.mark.parametrize("changes,field,words", [
    ({"settings.pressure_support_cmh2o": None}, "settings.pressure_support_cmh2o", "required in pressure-support"),
    ({"settings.vt_ml": 450}, "settings.vt_ml", "applies in volume mode only"),
    ({"settings.mode": "cpap"}, "settings.pressure_support_cmh2o", "not accepted in cpap mode"),
    ({"settings.pressure_support_cmh2o": 45}, "settings.pressure_support_cmh2o", "outside the accepted range 0 to 40"),
    ({"settings.cycle_off_fraction": 0.9}, "settings.cycle_off_fraction", "outside the accepted range 0.05 to 0.8"),
    ({"observations.0.vte_ml": None}, "observations[0].vte_ml", "required for a blood gas taken in pressure-support"),
    ({"observations.0.spontaneous_rr_per_min": None}, "observations[0].spontaneous_rr_per_min", "own VT and rate"),
    ({"observations.0.delta_pocc_cmh2o": 2}, "observations[0].delta_pocc_cmh2o", "outside the accepted range -60 to 0"),
])
def test_support_case_fields_are_checked_and_named(changes, field, words):
    with pytest.raises(CaseError) as err:
        validate(_case(**changes))
    assert err.value.field == field and words in str(err.value)


def test_support_settings_in_a_controlled_case_are_refused():
    doc = json.loads(dumps(load_demo("postop-wean")))
    doc["settings"]["pressure_support_cmh2o"] = 8
    with pytest.raises(CaseError, match="applies in pressure-support mode only"):
        validate(doc)


@pytest.fixture(scope="module")
def forecast(tmp_path_factory):
    case = load_demo(DEMO)
    return engine.forecast_case(case, ["pressure_support_cmh2o=8"])


def test_forecast_on_less_support_has_both_bounds_and_a_range_spanning_them(forecast):
    """Issue 22's JSON: spontaneous {pmus, vt, rr, rsbi, paco2: [lo, hi], bounds}. With 8 instead of 12 cmH2O
    the effort-unchanged bound breathes less (VT below the measured 560 mL, the same rate, PaCO2 up) and the
    drive-preserved bound breathes faster; the likely range spans both bounds and their draws."""
    sp = forecast["spontaneous"]
    for key in ("pmus_cmh2o", "vt_ml", "rr_per_min", "rsbi", "paco2_mmhg"):
        lo, hi = sp[key]
        assert lo <= hi, key
    same, kept = sp["bounds"]["effort_unchanged"], sp["bounds"]["drive_preserved"]
    now = sp["effort_now"]
    assert same["vt_ml"] < now["vt_ml"] - 50 and same["rr_per_min"] == now["rr_per_min"]
    assert kept["rr_per_min"] > now["rr_per_min"]
    assert same["paco2_mmhg"] > kept["paco2_mmhg"] + 5
    lo, hi = forecast["likely_range"]["paco2_mmhg"]
    for b in (same, kept):
        assert lo <= b["paco2_mmhg"] <= hi
        assert lo <= b["likely_range"]["paco2_mmhg"][0] and b["likely_range"]["paco2_mmhg"][1] <= hi
    assert forecast["steady"]["paco2_mmhg"] == same["paco2_mmhg"]  # the forecast shown is the effort-unchanged bound
    assert forecast["steady"]["mechanical_power_j_min"] is None
    assert "Bertoni" in now["pmus_basis"] and now["pmus_cmh2o"] == pytest.approx(0.75 * 6)
    codes = {a["code"] for a in forecast["alerts"]}
    assert "supported_breath" in codes


def test_effort_lines_match_their_own_numbers(forecast):
    """Every effort line of the Limits says ok exactly when its value is within its published limit."""
    lines = engine.effort_limit_lines(forecast["spontaneous"])
    assert {ln["source"] for ln in lines} >= {"Bertoni 2019", "Yang & Tobin 1991"}
    sp = forecast["spontaneous"]
    for name, words in (("effort_unchanged", "effort unchanged"), ("drive_preserved", "drive preserved")):
        b = sp["bounds"][name]
        for what, value, top in (("RSBI", b["rsbi"], RSBI_FAILURE), ("rate", b["rr_per_min"], RATE_MAX),
                                 ("Pmus", b["pmus_cmh2o"], PMUS_EXCESSIVE)):
            line = next(ln for ln in lines if ln["what"] == f"{words}: {what}")
            assert (line["status"] == "ok") == (value <= top), line


def test_support_cases_on_the_command_line(capsys):
    assert main(["predict", "--demo", DEMO, "--set", "pressure_support_cmh2o=8"]) == 0
    out = capsys.readouterr().out
    assert "effort unchanged" in out and "drive preserved" in out and "Forecast (effort unchanged)" in out
    assert out.rstrip().endswith("licensed clinicians.")
    # back to controlled ventilation from support: the current breathing stands in for "now"
    assert main(["predict", "--demo", DEMO, "--set", "mode=volume", "--set", "vt_ml=480", "--set", "rr_per_min=20",
                 "--format", "json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert "spontaneous" not in out and out["settings"]["pressure_support_cmh2o"] is None
    # support needs the patient's own breathing, measured on it
    assert main(["predict", "--demo", "ards-moderate", "--set", "mode=pressure-support",
                 "--set", "pressure_support_cmh2o=10"]) == 2
    err = capsys.readouterr().err
    assert "trial settings.mode" in err and "patient's own breathing" in err and "Traceback" not in err
    assert main(["plan", "--demo", DEMO]) == 2
    assert "ventcast wean" in capsys.readouterr().err


def test_wean_on_support_steps_down_with_both_bounds(capsys):
    """The step-down of support from 12 cmH2O: 2 cmH2O steps to the breathing-trial conditions (8 on PEEP 5),
    each step with both bounds; every rule a bound breaks is named (pH below 7.32 where the effort stays the
    same) and the plan does not end before the drive-preserved bound breaks one."""
    assert main(["wean", "--demo", DEMO, "--format", "json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert [s["settings"]["pressure_support_cmh2o"] for s in out["steps"]] == [10, 8]
    assert out["reached_target"] and out["stopped_because"] is None
    for st in out["steps"]:
        for b in st["bounds"].values():
            assert ("pH below 7.32" in " ".join(b["breaks"])) == (b["ph"] < PH_MIN)
        assert not st["bounds"]["drive_preserved"]["breaks"]
    assert main(["wean", "--demo", DEMO]) == 0
    text = capsys.readouterr().out
    assert "breaks: pH below 7.32" in text and "breathing-trial conditions are reached" in text


def test_switching_modes_drops_the_old_modes_settings():
    case = load_demo(DEMO)
    trial = engine.apply_sets(case, ["mode=pressure", "inspiratory_pressure_cmh2o=12"])
    assert trial["pressure_support_cmh2o"] is None and trial["cycle_off_fraction"] is None
    back = engine.apply_sets(load_demo("postop-wean"), ["mode=pressure-support", "pressure_support_cmh2o=8"])
    assert back["inspiratory_pressure_cmh2o"] is None and back["cycle_off_fraction"] == 0.25
    with pytest.raises(CaseError, match="applies in pressure-support mode only"):
        engine.apply_sets(load_demo("postop-wean"), ["pressure_support_cmh2o=8"])
    cpap = engine.apply_sets(copy.deepcopy(case), ["mode=cpap"])
    assert cpap["pressure_support_cmh2o"] is None


def test_a_gas_on_support_is_added_with_its_own_breathing(tmp_path, capsys):
    """add-gas takes the patient's own rate, P0.1 and the occlusion swing; on support it refuses a gas without
    the measured VT and rate, naming the field, and leaves the file as it was."""
    path = tmp_path / "case.ventcast.json"
    path.write_text(dumps(load_demo(DEMO)))
    assert main(["add-gas", str(path), "--pao2-mmhg", "80", "--paco2-mmhg", "47", "--ph", "7.35", "--vte-ml", "430",
                 "--spontaneous-rr-per-min", "27", "--p01-cmh2o", "3.1", "--delta-pocc-cmh2o=-8",
                 "--set", "pressure_support_cmh2o=10", "--at", "2026-09-02T10:00:00Z"]) == 0
    capsys.readouterr()
    obs = json.loads(path.read_text())["observations"][-1]
    assert (obs["spontaneous_rr_per_min"], obs["p01_cmh2o"], obs["delta_pocc_cmh2o"]) == (27, 3.1, -8)
    before = path.read_text()
    assert main(["add-gas", str(path), "--pao2-mmhg", "80", "--paco2-mmhg", "47", "--ph", "7.35",
                 "--at", "2026-09-02T11:00:00Z"]) == 2
    assert "vte_ml: required for a blood gas taken in pressure-support mode" in capsys.readouterr().err
    assert path.read_text() == before


def test_wean_steps_down_from_the_support_in_force_after_an_applied_change():
    """A change to 10 cmH2O applied after the last gas (taken on 12): the effort stays the one measured on 12,
    and the steps go down from 10."""
    case = load_demo(DEMO)
    case["settings"]["pressure_support_cmh2o"] = 10
    out = engine.wean_case(case)
    assert [s["settings"]["pressure_support_cmh2o"] for s in out["steps"]] == [8]
    assert out["steps"][0]["change"] == "pressure support 10 -> 8 cmH2O"
    assert out["effort_now"]["pressure_support_cmh2o"] == 12


def test_report_of_a_support_trial_shows_both_bounds():
    from ventcast.app.report import compute_forecasts, report_html

    case = load_demo(DEMO)
    forecasts = compute_forecasts(case, {"A": ["pressure_support_cmh2o=8"]})
    html = report_html(case, forecasts)
    assert "two bounds" in html and "effort unchanged" in html and "drive preserved" in html
    b = forecasts["A"]["spontaneous"]["bounds"]
    assert f"<td>{b['drive_preserved']['vt_ml']:.0f}</td>" in html


def test_a_new_case_on_pressure_support(tmp_path, capsys):
    """`new` takes a case on support (its support required, no VT or inspiratory pressure), and after a gas with
    the patient's own breathing it forecasts a lower support with both bounds."""
    path = tmp_path / "new.ventcast.json"
    base = ["new", "--out", str(path), "--sex", "female", "--height-cm", "165", "--weight-kg", "70", "--set",
            "mode=pressure-support", "--set", "fio2=0.4", "--set", "peep_cmh2o=5", "--set", "rr_per_min=12",
            "--set", "inspiratory_time_s=1.0"]
    assert main(base) == 2
    assert "pressure_support_cmh2o: required for a new case" in capsys.readouterr().err
    assert main(base + ["--set", "pressure_support_cmh2o=10"]) == 0
    assert main(["add-gas", str(path), "--pao2-mmhg", "85", "--paco2-mmhg", "44", "--ph", "7.38", "--vte-ml", "420",
                 "--spontaneous-rr-per-min", "20"]) == 0
    capsys.readouterr()
    assert main(["predict", str(path), "--set", "pressure_support_cmh2o=6", "--format", "json"]) == 0
    sp = json.loads(capsys.readouterr().out)["spontaneous"]
    assert sp["bounds"]["drive_preserved"]["rr_per_min"] > 20 and sp["vt_ml"][1] < 420


def test_a_case_put_on_support_before_any_gas_on_it_says_what_is_missing(capsys):
    """A controlled case whose current settings became pressure support (applied, no gas yet on support):
    the forecast names what is needed instead of failing."""
    case = json.loads(dumps(load_demo("postop-wean")))
    case["settings"] = dict(case["settings"], mode="pressure-support", pressure_support_cmh2o=10,
                            inspiratory_pressure_cmh2o=None, vt_ml=None)
    case = validate(case)
    with pytest.raises(CaseError, match="patient's own breathing"):
        engine.forecast_case(case, ["pressure_support_cmh2o=8"])


def test_a_support_trial_is_worked_out_once_per_fit():
    """The steady, course and range stages of one forecast ask for the same trial: the second ask is the first
    answer; another fit (a new object) is worked out again."""
    from dataclasses import replace

    case = load_demo(DEMO)
    _p, _o, result = engine.fit_case(case)
    trial = engine.apply_sets(case, ["pressure_support_cmh2o=8"])
    first = engine.supported_trial(case, result, trial)
    assert engine.supported_trial(case, result, dict(trial)) is first
    again = engine.supported_trial(case, replace(result), trial)
    assert again is not first
    assert float(again["bounds"]["drive_preserved"]["rr"]) == pytest.approx(float(first["bounds"]["drive_preserved"]["rr"]))


def test_cpap_for_a_weak_patient_draws_the_drive_preserved_bound_and_says_why(tmp_path, capsys):
    """The breathing-trial walkthrough's invented patient on CPAP: with the effort of now the VT barely clears
    the dead space (no steady state), so the forecast drawn is the drive-preserved bound, with a danger alert;
    that bound is rapid shallow breathing whose alveolar ventilation, rate x (VT - series dead space) (common
    practice), equals the one of now."""
    from ventcast.app.walkthrough import load_script
    case = load_script("breathing-trial")[0]["case"]
    path = tmp_path / "weak.ventcast.json"
    path.write_text(json.dumps(case))
    assert main(["predict", str(path), "--set", "mode=cpap", "--format", "json"]) == 0
    out = json.loads(capsys.readouterr().out)
    sp = out["spontaneous"]
    assert sp["drawn"] == "drive_preserved"
    assert sp["bounds"]["effort_unchanged"]["paco2_mmhg"] is None
    kept = sp["bounds"]["drive_preserved"]
    assert kept["attainable"] and kept["rr_per_min"] > RATE_MAX and kept["rsbi"] > RSBI_FAILURE
    assert kept["pmus_cmh2o"] > PMUS_EXCESSIVE
    assert any(a["code"] == "effort_unchanged_unsustainable" and a["severity"] == "danger" for a in out["alerts"])
    assert all(x is not None for x in out["likely_range"]["paco2_mmhg"])
    now = sp["effort_now"]
    _p, _o, result = engine.fit_case(validate(case))
    series = float(result.model.mechanics.anatomic_dead_space_ml) + case["settings"]["apparatus_dead_space_ml"]
    va_now = now["rr_per_min"] * (now["vt_ml"] - series)
    assert kept["rr_per_min"] * (kept["vt_ml"] - series) == pytest.approx(va_now, rel=0.03)
    assert main(["predict", str(path), "--set", "mode=cpap"]) == 0
    text = capsys.readouterr().out
    assert "Forecast (drive preserved)" in text and "nan" not in text
