"""Walkthroughs: events move the patient as the steady-state engine says, a fast clock reads exactly the
offline course (no drift, no lost events), draws carry analyser noise and a delay, bad scripts are refused."""

import copy
import json
from dataclasses import replace

import numpy as np
import pytest

from ventcast.app.cli import main
from ventcast.app.walkthrough import BUILT_IN, Run, built_in_text, score_text
from ventcast.physiology.dynamics.course import Change, simulate
from ventcast.physiology.forecast import PatientModel, predict
from ventcast.physiology.mechanics.ventilator import Mechanics, Settings

SCRIPT = json.loads(built_in_text("hypoxaemia-needs-peep"))


def _script(**changes):
    s = copy.deepcopy(SCRIPT)
    s.update(changes)
    return s


def test_a_shunt_event_settles_where_the_steady_state_engine_says():
    """+15 % shunt at FiO2 0.5: once settled, PaO2 equals the engine's steady state within 2 mmHg."""
    run = Run(_script(events=[{"minute": 5, "kind": "shunt_up", "value": 0.15}], start_settings={"fio2": 0.5},
                      duration_min=60))
    end = run.values_at(60.0)
    model = run.timeline.patient
    expected = predict(model.replace(shunt_fixed=float(model.shunt_fixed) + 0.15), run.timeline.settings)
    assert abs(end["pao2"] - float(expected.gas.pao2)) < 2.0
    assert end["pao2"] < run.values_at(4.9)["pao2"] - 5  # and it did fall


def test_a_run_at_60x_reads_the_offline_course_without_drift_or_lost_events():
    run = Run(_script(duration_min=60, speed=60))
    run.act(9.0, {"peep_cmh2o": 12})
    seen, t, tick_s = [], 0.0, 0.1  # a 100 ms timer at 60x moves the clock 6 s of patient time per tick
    run.inject(30.0, "metabolism_up", 1.2, "fever")
    worst = 0.0
    # The offline course, written out by hand (not from the run's own schedule): the scripted lung collapse
    # at minute 4 (recruitable lung +0.25, the pressure that held it open lost), PEEP 12 at minute 9, fever
    # (VO2 and VCO2 x 1.2) at minute 30.
    p0, s0 = run.timeline.patient, run.timeline.settings
    peep12 = replace(s0, peep=12.0)
    offline = simulate(p0, s0, [
        Change(4.0, settings=s0, patient={"recruitable": float(p0.mechanics.recruitable) + 0.25,
                                          "pressure_history": 0.0}),
        Change(9.0, settings=peep12),
        Change(30.0, settings=peep12, patient={"vo2": float(p0.vo2) * 1.2, "vco2": float(p0.vco2) * 1.2}),
    ], minutes=60.0)
    while t < 60.0 - 1e-9:
        nxt = min(t + tick_s * 60.0 / 60.0, 60.0)
        due = run.due(t, nxt)
        seen += [(e.minute, e.kind) for e in due["events"]]
        v = run.values_at(nxt)
        worst = max(worst, abs(v["pao2"] - float(np.interp(nxt, offline.minutes, offline.pao2))),
                    abs(v["paco2"] - float(np.interp(nxt, offline.minutes, offline.paco2))))
        t = nxt
    assert worst < 0.5
    assert seen == [(4.0, "lung_collapse"), (30.0, "metabolism_up")]


def test_draw_has_noise_and_a_result_delay():
    run = Run(_script(duration_min=30))
    d = run.draw(10.0)
    assert d["ready_at"] == 12.0
    truth = run.values_at(10.0)
    assert abs(d["pao2"] - truth["pao2"]) < 4 * (2 + 0.02 * truth["pao2"]) and d["pao2"] != truth["pao2"]
    assert run.due(10.0, 11.9)["results"] == [] and len(run.due(11.9, 12.0)["results"]) == 1


def test_score_follows_the_learner():
    run = Run(_script(duration_min=30))
    assert [s["met"] for s in run.score()] == [False, False]
    run.draw(8.0)
    run.act(9.0, {"peep_cmh2o": 12})
    assert [s["met"] for s in run.score()] == [True, True]
    late = Run(_script(duration_min=30))
    late.act(20.0, {"peep_cmh2o": 12})  # after the minute the script expects it by
    assert late.score()[1]["met"] is False


@pytest.mark.parametrize("name", BUILT_IN)
def test_built_in_scripts_run_headless(name, capsys):
    until = max(20.0, min(e["minute"] for e in json.loads(built_in_text(name))["events"]) + 1.0)
    assert main(["walkthrough", name, "--headless", "--until", f"{until:g}", "--format", "json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert set(out) >= {"events", "actions", "draws", "course", "score", "breathing", "caution"}
    assert set(out["course"]) == {"minutes", "pao2_mmhg", "paco2_mmhg", "ph", "sao2"}
    assert out["course"]["minutes"][-1] == until and out["events"]
    assert "no real patient" in json.loads(built_in_text(name))["summary"]


def test_actions_file_drives_a_headless_run(tmp_path, capsys):
    actions = tmp_path / "actions.json"
    actions.write_text(json.dumps([{"minute": 7, "draw": True}, {"minute": 9, "set": {"peep_cmh2o": 12}},
                                   {"minute": 10, "event": {"kind": "shunt_up", "value": 0.05}}]))
    assert main(["walkthrough", "hypoxaemia-needs-peep", "--headless", "--until", "30", "--actions", str(actions),
                 "--format", "json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert [a["changed"] for a in out["actions"]] == [["PEEP 12 cmH2O"]]
    assert [d["minute"] for d in out["draws"]] == [7.0]
    assert [e["source"] for e in out["events"]] == ["script", "instructor"]
    assert out["score"]["met"] == 2


def _bad(fn):
    s = copy.deepcopy(SCRIPT)
    fn(s)
    return json.dumps(s)


BAD = [
    ("not json", "{", "not valid JSON"),
    ("not an object", "[1]", "JSON object"),
    ("wrong format", _bad(lambda s: s.update(format="other")), "script.format"),
    ("newer version", _bad(lambda s: s.update(version=5)), "newer Ventcast"),
    ("unknown key", _bad(lambda s: s.update(colour="red")), "unknown key 'colour'"),
    ("no title", _bad(lambda s: s.pop("title")), "title"),
    ("no events", _bad(lambda s: s.pop("events")), "events"),
    ("speed 100", _bad(lambda s: s.update(speed=100)), "script.speed"),
    ("duration 0", _bad(lambda s: s.update(duration_min=0)), "script.duration_min"),
    ("event kind", _bad(lambda s: s["events"][0].update(kind="earthquake")), "script.events[0].kind"),
    ("event value out of range", _bad(lambda s: s["events"][0].update(value=0.9)), "script.events[0].value"),
    ("event after the end", _bad(lambda s: s["events"][0].update(minute=500)), "script.events[0].minute"),
    ("event negative minute", _bad(lambda s: s["events"][0].update(minute=-1)), "script.events[0].minute"),
    ("event unknown key", _bad(lambda s: s["events"][0].update(size=3)), "unknown key 'size'"),
    ("checkpoint without prompt", _bad(lambda s: s["checkpoints"][0].pop("prompt")), "script.checkpoints[0]"),
    ("checkpoint after the end", _bad(lambda s: s["checkpoints"][0].update(minute=999)), "script.checkpoints[0].minute"),
    ("goal without setting", _bad(lambda s: s["expected_actions"][1].pop("setting")), "script.expected_actions[1]"),
    ("goal setting unknown", _bad(lambda s: s["expected_actions"][1].update(setting="colour")), "setting"),
    ("case unknown demo", _bad(lambda s: s.update(case="demo:nobody")), "script.case"),
]


@pytest.mark.parametrize("name,text,needle", BAD, ids=[b[0] for b in BAD])
def test_invalid_scripts_are_refused_with_the_field_named(tmp_path, capsys, name, text, needle):
    path = tmp_path / "bad.walkthrough.json"
    path.write_text(text)
    assert main(["walkthrough", str(path), "--headless"]) == 2
    err = capsys.readouterr().err
    assert needle in err, err
    assert "Traceback" not in err


def test_bad_minutes_and_actions_are_refused(tmp_path, capsys):
    assert main(["walkthrough", "sudden-deterioration", "--headless", "--until", "500"]) == 2
    assert "--until" in capsys.readouterr().err
    actions = tmp_path / "a.json"
    actions.write_text(json.dumps([{"minute": 5, "set": {"fio2": 60}}]))
    assert main(["walkthrough", "sudden-deterioration", "--headless", "--actions", str(actions)]) == 2
    assert "did you mean 0.60" in capsys.readouterr().err
    actions.write_text(json.dumps([{"minute": 5, "jump": True}]))
    assert main(["walkthrough", "sudden-deterioration", "--headless", "--actions", str(actions)]) == 2
    assert "--actions[0]" in capsys.readouterr().err


def test_bronchospasm_moves_blood_flow_to_low_vq_units_and_the_gases():
    """resistance_up (bronchospasm) also moves blood flow to poorly ventilated units with little shunt, the
    MIGET pattern of acute severe asthma (Rodriguez-Roisin 1989, from memory): PaO2 falls by more than a
    blood gas can miss (one measurement SD), where resistance alone moved it by less; at a fixed minute
    ventilation PaCO2 rises a little (low-V/Q units retain some CO2), and the shunt stays small."""
    from ventcast.physiology.measurement import measurement_sd
    from ventcast.physiology.scenario import LOW_VQ_PER_DOUBLING
    base = PatientModel(pbw_kg=68, shunt_fixed=0.03, log_sd=1.1, dead_space_fraction=0.35, hb=13.5,
                        mechanics=Mechanics(resistance=20, c_max=55, flow_limitation=1.0))
    s = Settings(mode="volume", fio2=0.35, peep=5, vt_ml=480, rr=20, ti=1.0, apparatus_dead_space_ml=50)
    before = predict(base, s)
    airways_only = predict(base.replace(resistance=40.0), s)
    spasm = predict(base.replace(resistance=40.0, low_vq_fraction=LOW_VQ_PER_DOUBLING), s)
    assert before.success and spasm.success and airways_only.success
    sd_o2 = measurement_sd("pao2", float(before.gas.pao2))
    assert abs(float(before.gas.pao2 - airways_only.gas.pao2)) < sd_o2
    assert float(before.gas.pao2 - spasm.gas.pao2) > sd_o2
    assert float(spasm.gas.paco2) > float(before.gas.paco2)
    assert float(spasm.shunt) < 0.06


def test_score_and_timeline_speak_the_words_on_screen(capsys):
    """Issue 17: text meant for people never shows internal keys ("inspiratory_time_s at most 0.8",
    "event resistance_up 1.3")."""
    import re

    assert main(["walkthrough", "hypercapnia-gas-trapping", "--headless"]) == 0
    text = capsys.readouterr().out
    assert "Ti at most 0.8 s by minute 15" in text and "airway resistance rises to 130 %" in text
    assert not re.search(r"\b[a-z0-9]+_[a-z0-9_]+\b", text), re.findall(r"\b[a-z0-9]+_[a-z0-9_]+\b", text)


def test_headless_timeline_is_in_time_order_and_in_words(capsys):
    """Issue 18: the debrief's timeline merges events, prompts, learner actions, draws and results in
    time order (a result at 7 min before an 8-min prompt), in the words on screen."""
    actions = [{"minute": 5, "draw": True}, {"minute": 9, "set": {"peep_cmh2o": 12}}]
    run = Run(json.loads(built_in_text("hypoxaemia-needs-peep")))
    from ventcast.app.walkthrough import apply_actions_file
    apply_actions_file(run, json.dumps(actions))
    out = run.debrief()
    minutes = [t["minute"] for t in out["timeline"]]
    assert minutes == sorted(minutes)
    whats = [t["what"] for t in out["timeline"]]
    assert whats.index("blood gas result") < whats.index("prompt", whats.index("blood gas drawn"))
    assert any(t["detail"] == "PEEP 12 cmH2O" for t in out["timeline"] if t["what"] == "learner")
    assert out["summary"] and "story" not in out


def test_new_script_command_opens_the_editor_and_refuses_bad_paths(tmp_path, capsys):
    """`ventcast walkthrough --new FILE` opens the editor (offscreen here, closed after half a second);
    a path that is not a .walkthrough.json file, or SCRIPT with --new, is refused with exit 2."""
    import os
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    assert main(["walkthrough", "--new", str(tmp_path / "a.walkthrough.json"), "--quit-after", "0.5"]) == 0
    assert not (tmp_path / "a.walkthrough.json").exists()  # nothing saved until Save
    assert main(["walkthrough", "--new", str(tmp_path / "a.json")]) == 2
    assert "--new" in capsys.readouterr().err
    assert main(["walkthrough", "hypoxaemia-needs-peep", "--new", str(tmp_path / "b.walkthrough.json")]) == 2
    assert main(["walkthrough"]) == 2


def test_a_run_stopped_early_scores_only_what_was_due():
    """Finishing at minute 12 of a script that expects a draw by minute 10 and PEEP by minute 15: the PEEP
    item is not yet due (neither met nor missed), and the score counts the due item only."""
    run = Run(_script(duration_min=30))
    run.draw(8.0)
    out = run.debrief(12.0)
    items = out["score"]["items"]
    assert [s["met"] for s in items] == [True, None] and "not yet due" in items[1]["expected"]
    assert (out["score"]["met"], out["score"]["of"], out["score"]["not_yet_due"]) == (1, 1, 1)
    assert score_text(out) == "1 of 1 (1 not yet due)"  # the words of the command line, window and exported debrief
    assert [s["met"] for s in run.score()] == [True, False]  # the whole run: the PEEP was never set
