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
