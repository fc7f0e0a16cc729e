"""A walkthrough of a patient breathing on pressure support: the built-in breathing trial that fails (rapid
shallow breathing) and passes after a day's recovery, the breath at each change, refusals and undo."""

import json

import numpy as np
import pytest

from ventcast.app.casefile import CaseError
from ventcast.app.cli import main
from ventcast.app.walkthrough import Run, load_script
from ventcast.physiology.mechanics.spontaneous import RSBI_FAILURE, supported_breath
from ventcast.physiology.planning.support import RATE_MAX
from ventcast.physiology.scenario import Effort

#: The learner of the built-in script: a trial at PS 5, a gas, support back, the trial again after the recovery.
ACTIONS = [{"minute": 5, "set": {"pressure_support_cmh2o": 5}}, {"minute": 20, "draw": True},
           {"minute": 24, "set": {"pressure_support_cmh2o": 12}}, {"minute": 55, "set": {"pressure_support_cmh2o": 5}}]


@pytest.fixture(scope="module")
def script():
    return load_script("breathing-trial")[0]


@pytest.fixture(scope="module")
def debrief(tmp_path_factory):
    path = tmp_path_factory.mktemp("walk") / "actions.json"
    path.write_text(json.dumps(ACTIONS))
    import contextlib
    import io
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        assert main(["walkthrough", "breathing-trial", "--headless", "--actions", str(path), "--format", "json"]) == 0
    return json.loads(out.getvalue())


def _segment(debrief, minute):
    return next(b for b in debrief["breathing"] if b["from_minute"] <= minute < b["to_minute"])


def test_the_trial_fails_by_rapid_shallow_breathing_then_passes_after_the_recovery(debrief):
    """Failure by the breathing pattern (rate above 35/min: Boles 2007, from memory; RSBI above 105: Yang &
    Tobin 1991) while the PaCO2 is kept; the same trial after the scripted recovery breaks no stop rule."""
    before = _segment(debrief, 1)
    failed = _segment(debrief, 10)
    passed = _segment(debrief, 60)
    assert before["breaks"] == []
    assert failed["rr_per_min"] > RATE_MAX and failed["rsbi"] > RSBI_FAILURE
    assert any("RSBI" in b for b in failed["breaks"]) and any("rate" in b for b in failed["breaks"])
    assert failed["vt_ml"] < before["vt_ml"] and failed["rr_per_min"] > before["rr_per_min"]
    assert passed["breaks"] == [] and passed["rsbi"] < RSBI_FAILURE and passed["rr_per_min"] < RATE_MAX
    # The drive is kept: PaCO2 during the failed trial within 2 mmHg of the start (the gas drawn says so too).
    c = debrief["course"]
    paco2 = np.interp([4.0, 20.0], c["minutes"], c["paco2_mmhg"])
    assert abs(paco2[1] - paco2[0]) < 2.0
    assert debrief["score"]["met"] == debrief["score"]["of"] == 4


def test_a_defended_ventilation_is_kept_by_the_reported_breath(script):
    """Independent arithmetic on the reported breath: alveolar ventilation = rate x (VT - series dead space)
    (common practice) equals the one defended at the start, at every support the patient can manage."""
    run = Run(script)
    effort = run.timeline.effort
    series = float(np.asarray(run.fit.model.mechanics.anatomic_dead_space_ml)) + run.case["settings"]["apparatus_dead_space_ml"]
    for ps in (12.0, 8.0, 6.0):
        run.act(5.0, {"pressure_support_cmh2o": ps})
        b = run.timeline.breathing_at(6.0)
        va = b["rr"] * (float(b["breath"].vt_ml) - series) / 1000.0
        assert b["attainable"]
        assert va == pytest.approx(effort.alveolar_ventilation, rel=0.02)
        run.revert_last()


def test_the_start_breath_is_the_measured_one_and_follows_the_equation_of_motion(script):
    """At the support the gas was taken on, the breath is the measured VT and rate (the effort is inverted from
    them); and the reported breath is supported_breath's with the reported compliance (no second model)."""
    run = Run(script)
    obs = run.case["observations"][-1]
    b = run.timeline.breathing_at(0.0)
    assert float(b["breath"].vt_ml) == pytest.approx(obs["vte_ml"], abs=5.0)
    assert b["rr"] == pytest.approx(obs["spontaneous_rr_per_min"], abs=0.5)
    e = run.timeline.effort
    again = supported_breath(12.0, 5.0, float(np.asarray(run.fit.model.mechanics.resistance)), b["compliance_ml"],
                             float(b["breath"].pmus), b["rr"], e.ti_neural)
    assert float(again.vt_ml) == pytest.approx(float(b["breath"].vt_ml), abs=0.5)


def test_effort_unchanged_patient_keeps_rate_and_loses_volume(script):
    run = Run(dict(script, patient_response="effort_unchanged"))
    start = run.timeline.breathing_at(0.0)
    run.act(5.0, {"pressure_support_cmh2o": 6})
    low = run.timeline.breathing_at(6.0)
    assert low["rr"] == pytest.approx(start["rr"]) and float(low["breath"].vt_ml) < float(start["breath"].vt_ml) - 50
    c = run.course()
    assert np.interp(40.0, c.minutes, c.paco2) > np.interp(4.0, c.minutes, c.paco2) + 5.0


def test_more_co2_production_raises_the_rate_of_a_patient_who_keeps_their_drive(script):
    run = Run(script)
    series = float(np.asarray(run.fit.model.mechanics.anatomic_dead_space_ml)) + run.case["settings"]["apparatus_dead_space_ml"]
    before = run.timeline.breathing_at(0.0)
    run.inject(10.0, "metabolism_up", 1.4)
    after = run.timeline.breathing_at(11.0)
    va = [b["rr"] * (float(b["breath"].vt_ml) - series) for b in (before, after)]
    assert after["rr"] > before["rr"] and va[1] > 1.2 * va[0]


def test_a_mode_change_is_refused_naming_the_field_value_and_accepted(script):
    run = Run(script)
    with pytest.raises(CaseError) as err:
        run.act(5.0, ["mode=volume", "vt_ml=400"])
    text = str(err.value)
    assert "mode" in text and "'volume'" in text and "pressure-support or cpap" in text
    assert run.timeline.actions == [] and len(run.learner) == 1


def test_a_change_the_patient_cannot_be_followed_through_is_refused_and_undone(script):
    """CPAP for a patient who keeps the same effort: too little ventilation to live on. Refused with the reason,
    and the run is as before (no action, no log entry)."""
    run = Run(dict(script, patient_response="effort_unchanged"))
    with pytest.raises(CaseError) as err:
        run.act(5.0, ["mode=cpap"])
    assert "cannot be followed" in str(err.value)
    assert run.timeline.actions == [] and run.action_log == [] and len(run.learner) == 1
    assert run.course().success.all()


def test_a_script_with_an_unknown_response_is_refused(script):
    from ventcast.app.walkthrough import loads_script
    with pytest.raises(CaseError) as err:
        loads_script(json.dumps(dict(script, patient_response="panics")))
    assert "patient_response" in str(err.value) and "panics" in str(err.value)
    with pytest.raises(ValueError):
        Effort(5.0, 20.0, 1.0, 5.0, 400.0, response="panics")


def test_headless_text_says_the_breathing_and_the_verdict(tmp_path, capsys):
    path = tmp_path / "actions.json"
    path.write_text(json.dumps(ACTIONS[:1]))
    assert main(["walkthrough", "breathing-trial", "--headless", "--until", "20", "--actions", str(path)]) == 0
    out = capsys.readouterr().out
    assert "The patient's breathing on support:" in out and "RSBI above 105" in out and "Caution" in out


@pytest.mark.parametrize("action,field,words", [
    ({"minute": 5, "set": {"mode": "volume", "vt_ml": 400}}, "--actions[0].set.mode", "pressure-support or cpap"),
    ({"minute": 5, "set": {"pressure_support_cmh2o": 45}}, "--actions[0].set.pressure_support_cmh2o", "0 to 40"),
    ({"minute": 5, "event": {"kind": "compliance_down", "value": 0.2}}, "--actions[0].event:",
     "compliance = 4.9"),
])
def test_refused_actions_name_the_action_the_value_and_what_is_accepted(tmp_path, capsys, action, field, words):
    path = tmp_path / "actions.json"
    path.write_text(json.dumps([action]))
    assert main(["walkthrough", "breathing-trial", "--headless", "--actions", str(path)]) == 2
    err = capsys.readouterr().err
    assert field in err and words in err and "Traceback" not in err


def test_a_response_for_a_controlled_patient_is_refused(tmp_path, capsys):
    from ventcast.app.walkthrough import built_in_text
    script = dict(json.loads(built_in_text("hypoxaemia-needs-peep")), patient_response="effort_unchanged")
    path = tmp_path / "x.walkthrough.json"
    path.write_text(json.dumps(script))
    assert main(["walkthrough", str(path), "--headless"]) == 2
    err = capsys.readouterr().err
    assert "script.patient_response" in err and "'effort_unchanged'" in err and "volume mode" in err
