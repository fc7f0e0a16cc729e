"""Hostile and careless input (issue 21): the shared readers refuse what would switch a check off,
lose data or hang; writes keep the target's permissions. Each test reproduces a reported item."""

import json
import os
import stat
import subprocess
import sys

import pytest

from ventcast.app import casefile
from ventcast.app.casefile import CaseError, parse_json, read_text, write_atomic
from ventcast.app.cli import main


def _demo_text():
    return casefile.demo_text("ards-moderate")


@pytest.mark.parametrize("constant", ["NaN", "Infinity", "-Infinity", "1e999"])
def test_non_finite_numbers_are_refused_by_the_reader(constant):
    """Item 5: a NaN goal switched its check off; the reader refuses NaN and Infinity outright."""
    with pytest.raises(CaseError, match="finite"):
        parse_json('{"goals": {"pplat_max_cmh2o": %s}}' % constant, "(file)")


def test_nan_goal_in_a_case_file_exits_2_naming_it(tmp_path, capsys):
    doc = json.loads(_demo_text())
    text = json.dumps(doc).replace('"format"', '"goals": {"pplat_max_cmh2o": NaN}, "format"', 1)
    path = tmp_path / "nan.ventcast.json"
    path.write_text(text)
    assert main(["predict", str(path)]) == 2
    err = capsys.readouterr().err
    assert "NaN" in err and "finite" in err and "Traceback" not in err


def test_duplicate_keys_are_refused():
    """Item 11: "fio2": 0.6, "fio2": 1.0 -- the last would silently win."""
    with pytest.raises(CaseError, match="'fio2' appears twice"):
        parse_json('{"settings": {"fio2": 0.6, "fio2": 1.0}}', "(file)")


def test_deep_nesting_is_refused_without_recursion_error():
    """Item 17: deeply nested JSON gave a RecursionError (exit 1)."""
    with pytest.raises(CaseError, match="nested more than"):
        parse_json("[" * 100_000 + "]" * 100_000, "(file)")
    # brackets inside strings are not nesting
    assert parse_json('{"note": "' + "[" * 200 + '"}', "(file)") == {"note": "[" * 200}


def test_huge_integer_named_not_python_digit_limit():
    with pytest.raises(CaseError, match="integer of 5000 digits"):
        parse_json('{"age_years": ' + "9" * 5000 + "}", "(file)")


def test_devices_fifos_and_folders_are_refused(tmp_path):
    """Item 19: /dev/zero was read until memory ran out; a FIFO blocked forever."""
    with pytest.raises(CaseError, match="not a regular file"):
        read_text("/dev/zero", "(file)")
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    with pytest.raises(CaseError, match="not a regular file"):
        read_text(fifo, "--actions")
    with pytest.raises(CaseError, match="a folder"):
        read_text(tmp_path, "(file)")


def test_actions_file_is_bounded_and_named(tmp_path):
    """Item 19: --actions had no size limit and read devices."""
    out = subprocess.run([sys.executable, "-m", "ventcast", "walkthrough", "hypoxaemia-needs-peep", "--headless",
                          "--actions", "/dev/zero"], capture_output=True, text=True, timeout=60)
    assert out.returncode == 2 and "--actions" in out.stderr and "Traceback" not in out.stderr
    big = tmp_path / "big.json"
    big.write_text("[" + ",".join(["{}"] * 600_000) + "]")
    with pytest.raises(CaseError, match="at most"):
        read_text(big, "--actions")


def test_write_keeps_the_permissions_of_the_file_it_replaces(tmp_path):
    """Item 4: every atomic write left mode 0600, so overwriting a 0644 file changed its permissions."""
    target = tmp_path / "case.ventcast.json"
    target.write_text("old")
    os.chmod(target, 0o644)
    write_atomic(target, "new")
    assert stat.S_IMODE(target.stat().st_mode) == 0o644 and target.read_text() == "new"
    os.chmod(target, 0o640)
    write_atomic(target, "newer")
    assert stat.S_IMODE(target.stat().st_mode) == 0o640
    fresh = tmp_path / "fresh.json"
    old_mask = os.umask(0o022)
    try:
        write_atomic(fresh, "x")
    finally:
        os.umask(old_mask)
    assert stat.S_IMODE(fresh.stat().st_mode) == 0o644
    private = tmp_path / "recovery.json"
    write_atomic(private, "x", mode=0o600)
    assert stat.S_IMODE(private.stat().st_mode) == 0o600
    assert not list(tmp_path.glob("*.tmp"))


def test_failed_forecast_carries_nan_in_every_number():
    """Item 14: a failed result carried finite blood gases (success False with PaO2 100, PaCO2 196),
    computed by the lung with stand-in values where the mechanics had failed."""
    import dataclasses

    import numpy as np

    from ventcast.physiology.forecast import PatientModel, predict
    from ventcast.physiology.mechanics.ventilator import Mechanics, Settings
    patient = PatientModel(mechanics=Mechanics(c_max=15.0))
    # VT 1300 mL into a 15 mL/cmH2O lung does not fit (mechanics fail); 450 mL does.
    settings = Settings(mode="volume", fio2=0.5, peep=5.0, vt_ml=np.array([450.0, 1300.0]), rr=16.0, ti=1.0)
    pred = predict(patient, settings)
    assert list(np.asarray(pred.success)) == [True, False]
    for part in (pred.gas, pred.breathing):
        for f in dataclasses.fields(part):
            value = getattr(part, f.name)
            if isinstance(value, np.ndarray) and value.dtype.kind == "f":
                assert np.all(np.isnan(value[1])), f"{type(part).__name__}.{f.name} is finite in a failed case"
                assert np.all(np.isfinite(value[0])) or f.name.startswith("unit_"), f.name
        assert not bool(np.asarray(part.success)[1])
    single = predict(patient, Settings(mode="volume", fio2=0.5, peep=5.0, vt_ml=1300.0, rr=16.0, ti=1.0))
    assert not single.success and np.isnan(single.gas.pao2) and np.isnan(single.gas.paco2)


@pytest.mark.parametrize("goals,field,words", [
    ({"pao2_mmhg": [80, 55]}, "goals.pao2_mmhg", "low end must come first"),
    ({"vt_ml_per_kg_pbw": [8, 4]}, "goals.vt_ml_per_kg_pbw", "low end must come first"),
    ({"spo2": [88, 95]}, "goals.spo2", "looks like percent"),
    ({"ph": [7.3, 9.0]}, "goals.ph[1]", "outside the accepted range"),
])
def test_goal_ranges_must_be_ordered_and_in_their_unit(goals, field, words):
    """Item 5: inverted ranges ([80, 55]; VT [8, 4]) and SpO2 limits in percent ([88, 95]) were accepted."""
    doc = json.loads(_demo_text())
    doc["goals"] = goals
    with pytest.raises(CaseError) as info:
        casefile.validate(doc)
    assert info.value.field == field and words in str(info.value)


def test_walkthrough_nan_is_refused_naming_the_script(tmp_path, capsys):
    """Items 13 and 20: an event at minute NaN never happened; speed NaN crashed the window. The script
    reader now refuses NaN before anything else reads it."""
    from ventcast.app.walkthrough import built_in_text
    doc = built_in_text("hypoxaemia-needs-peep")
    script = tmp_path / "nan.walkthrough.json"
    script.write_text(doc.replace('"speed":', '"speed": NaN, "x_speed":', 1) if '"speed":' in doc
                      else doc.replace("{", '{"draw_delay_min": NaN, ', 1))
    assert main(["walkthrough", str(script), "--headless"]) == 2
    err = capsys.readouterr().err
    assert "script" in err and "NaN" in err and "Traceback" not in err


def test_import_fhir_does_not_replace_an_existing_case_without_force(tmp_path, capsys):
    """Item 4: import-fhir --out EXISTING replaced an unrelated case without asking (exit 0)."""
    from pathlib import Path
    bundle = Path(__file__).parent / "data" / "fhir-abg-bundle.json"
    existing = tmp_path / "other.ventcast.json"
    existing.write_text(_demo_text())
    before = existing.read_bytes()
    assert main(["import-fhir", str(bundle), "--out", str(existing)]) == 2
    assert "--force" in capsys.readouterr().err and existing.read_bytes() == before
    assert main(["import-fhir", str(bundle), "--out", str(tmp_path / "missing" / "x.ventcast.json")]) == 2
    assert "does not exist" in capsys.readouterr().err
    (tmp_path / "d.ventcast.json").mkdir()
    assert main(["import-fhir", str(bundle), "--out", str(tmp_path / "d.ventcast.json")]) == 2
    assert "not a regular file" in capsys.readouterr().err
    os.chmod(existing, 0o644)
    assert main(["import-fhir", str(bundle), "--out", str(existing), "--force"]) == 0
    assert existing.read_bytes() != before and stat.S_IMODE(existing.stat().st_mode) == 0o644


def test_observations_out_of_order_use_the_newest_and_bad_dates_are_refused():
    """Item 12: 'now' came from the older gas when the file listed the newer first; impossible and
    far-future dates were accepted."""
    doc = json.loads(_demo_text())
    assert len(doc["observations"]) >= 2
    newest = max(doc["observations"], key=lambda o: o["taken_at"])
    doc["observations"] = list(reversed(doc["observations"]))
    case = casefile.validate(doc)
    assert case["observations"][-1] == casefile.validate(json.loads(_demo_text()))["observations"][-1]
    assert case["observations"][-1]["taken_at"] == newest["taken_at"]
    for bad, words in (("2026-02-31T25:61Z", "not a real date"), ("2026-02-30T10:00Z", "not a real date"),
                       ("2999-01-01T10:00Z", "in the future")):
        doc = json.loads(_demo_text())
        doc["observations"][0]["taken_at"] = bad
        with pytest.raises(CaseError) as info:
            casefile.validate(doc)
        assert info.value.field == "observations[0].taken_at" and words in str(info.value)


def test_a_long_array_is_named_by_its_length_not_dumped(tmp_path, capsys):
    """Unclear messages: 201 observations dumped 57 KB of stderr."""
    doc = json.loads(_demo_text())
    doc["observations"] = doc["observations"] * 101
    path = tmp_path / "long.ventcast.json"
    path.write_text(json.dumps(doc))
    assert main(["fit", str(path)]) == 2
    err = capsys.readouterr().err
    assert "observations" in err and "at most 200" in err and len(err) < 300


@pytest.mark.parametrize("value,words", [("1_2", "not a number"), ("nan", "not a number"), ("0x10", "not a number"),
                                         ("1e999", "finite")])
def test_set_values_are_plain_finite_numbers(capsys, value, words):
    """Unclear messages: 'peep_cmh2o=1_2' was read as 12."""
    assert main(["predict", "--demo", "ards-moderate", "--set", f"peep_cmh2o={value}"]) == 2
    err = capsys.readouterr().err
    assert "--set peep_cmh2o" in err and words in err


def test_a_setting_of_the_other_mode_is_refused_not_ignored(capsys):
    """Unclear messages: --set inspiratory_pressure_cmh2o=20 in volume mode was silently ignored."""
    assert main(["predict", "--demo", "ards-moderate", "--set", "inspiratory_pressure_cmh2o=20"]) == 2
    err = capsys.readouterr().err
    assert "--set inspiratory_pressure_cmh2o" in err and "pressure mode only" in err
    from ventcast.app.engine import apply_sets
    trial = apply_sets(casefile.load_demo("ards-moderate"), ["mode=pressure", "inspiratory_pressure_cmh2o=20"])
    assert trial["mode"] == "pressure" and trial["inspiratory_pressure_cmh2o"] == 20


def _script(tmp_path, **changes):
    from ventcast.app.walkthrough import built_in_text
    doc = json.loads(built_in_text("hypoxaemia-needs-peep"))
    doc.update(changes)
    path = tmp_path / "s.walkthrough.json"
    path.write_text(json.dumps(doc))
    return path


def test_script_case_paths_stay_in_the_scripts_folder(tmp_path, capsys):
    """Item 19: a script's case path could be absolute or climb out with '../'."""
    outside = tmp_path / "elsewhere.ventcast.json"
    outside.write_text(_demo_text())
    inner = tmp_path / "scripts"
    inner.mkdir()
    for ref in ("../elsewhere.ventcast.json", str(outside), "/dev/zero"):
        script = _script(inner, case=ref)
        assert main(["walkthrough", str(script), "--headless"]) == 2
        err = capsys.readouterr().err
        assert "script.case" in err and "outside the script's folder" in err, err
    (inner / "beside.ventcast.json").write_text(_demo_text())
    script = _script(inner, case="beside.ventcast.json", duration_min=20)
    assert main(["walkthrough", str(script), "--headless", "--until", "1", "--format", "json"]) == 0


def test_bad_start_settings_and_actions_are_named_where_they_are(tmp_path, capsys):
    """Unclear messages: bad start_settings were reported as '--set fio2'; bad actions lacked their index."""
    script = _script(tmp_path, start_settings={"fio2": 60})
    assert main(["walkthrough", str(script), "--headless"]) == 2
    err = capsys.readouterr().err
    assert "script.start_settings.fio2" in err and "--set" not in err
    actions = tmp_path / "a.json"
    actions.write_text(json.dumps([{"minute": 1, "draw": True}, {"minute": 5, "set": {"peep_cmh2o": 99}}]))
    assert main(["walkthrough", "hypoxaemia-needs-peep", "--headless", "--actions", str(actions)]) == 2
    err = capsys.readouterr().err
    assert "--actions[1].set" in err and "peep_cmh2o" in err
    actions.write_text(json.dumps([{"minute": 1, "draw": True}, {"minute": 500, "draw": True}]))
    assert main(["walkthrough", "hypoxaemia-needs-peep", "--headless", "--actions", str(actions)]) == 2
    assert "--actions[1]" in capsys.readouterr().err


def test_bad_output_paths_exit_2_before_anything_is_written(tmp_path, capsys):
    """Item 18: a folder, a missing parent or a path under a file gave exit 1; report --csv FILE failed
    after the PDF was written; a bad screenshot path left x.png.tmp behind."""
    a_file = tmp_path / "file.txt"
    a_file.write_text("keep")
    (tmp_path / "dir.pdf").mkdir()
    cases = [
        (["report", "--demo", "ards-moderate", "--out", str(tmp_path / "dir.pdf")], "--out", "not a regular file"),
        (["report", "--demo", "ards-moderate", "--out", str(tmp_path / "no" / "r.pdf")], "--out", "does not exist"),
        (["report", "--demo", "ards-moderate", "--out", str(a_file / "r.pdf")], "--out", "does not exist"),
        (["report", "--demo", "ards-moderate", "--out", str(tmp_path / "r.pdf"), "--csv", str(a_file)], "--csv",
         "not a folder"),
        (["report", "--demo", "ards-moderate", "--out", str(a_file.with_suffix(".pdf"))], None, None),
        (["open", "--demo", "ards-moderate", "--screenshot", str(tmp_path / "no" / "x.png")], "--screenshot",
         "does not exist"),
        (["demo", "--out", str(a_file)], "--out", "not a folder"),
        (["demo", "--out", str(a_file / "sub")], "--out", "does not exist"),
    ]
    (tmp_path / "file.pdf").write_text("not a pdf")
    cases[4] = (cases[4][0], "--out", "refusing to replace it")
    before = sorted(p.name for p in tmp_path.iterdir())
    for args, option, words in cases:
        assert main(args) == 2, args
        err = capsys.readouterr().err
        assert option in err and words in err and "Traceback" not in err, (args, err)
    assert sorted(p.name for p in tmp_path.iterdir()) == before
    assert a_file.read_text() == "keep" and (tmp_path / "file.pdf").read_text() == "not a pdf"


def test_a_very_short_course_warns_nothing(recwarn):
    """Noise on stderr: a course of a few seconds printed a numpy RuntimeWarning (0/0 in its CO2
    balance); it now says the balance is not defined (NaN) and warns nothing."""
    import warnings
    from dataclasses import replace

    import numpy as np

    from ventcast.physiology.dynamics.course import Change, simulate
    from ventcast.physiology.forecast import PatientModel
    from ventcast.physiology.mechanics.ventilator import Settings
    s = Settings(mode="volume", fio2=0.5, peep=5.0, vt_ml=450.0, rr=16.0, ti=1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        course = simulate(PatientModel(), s, [Change(0.0, settings=replace(s, peep=8.0))], minutes=0.01)
    assert bool(np.all(course.success)) and np.isnan(course.co2_balance_error)


def test_the_engine_range_check_fast_paths_agree_with_its_general_path():
    """check_range takes shortcuts for a plain float and a float array inside the range; NaN, infinities,
    values on an open bound and values outside must still be refused with the general path's words."""
    import numpy as np

    from ventcast.physiology._checks import check_range

    def outcome(value, low, high, li, hi):
        try:
            return float(np.max(check_range("PEEP", value, low, high, "cmH2O", li, hi)))
        except ValueError as exc:
            return str(exc)

    values = [0.0, 5.0, 30.0, 30.000001, -1e-9, float("nan"), float("inf"), -float("inf")]
    for low, high in ((0.0, 30.0), (0.0, float("inf"))):
        for li in (True, False):
            for hi in (True, False):
                for v in values:
                    general = outcome([v], low, high, li, hi)  # a list never takes a shortcut
                    assert outcome(v, low, high, li, hi) == general
                    assert outcome(np.array([5.0, v]), low, high, li, hi) == outcome([5.0, v], low, high, li, hi)
