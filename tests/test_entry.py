"""Bringing the patient in (issue 15): the pasted-result reader, new cases, blood gases, applied changes
and the forecast check, on the command line; every refusal names the field and leaves the case file
byte-for-byte unchanged. Pasted texts below are our own invention, in no vendor's layout."""

import json

import pytest

from ventcast.app import MMHG_PER_KPA
from ventcast.app.casefile import CaseError, dumps, load, load_demo
from ventcast.app.cli import main
from ventcast.app.entry import add_observation, apply_change, forecast_check, new_case
from ventcast.app.paste import read_pasted

# --- the pasted-result reader --------------------------------------------------------------------

READ_EXACTLY = [
    # (text, gas unit answer, expected values)
    ("pH 7.32\npCO2 6.7 kPa\nPO2 72 mmHg\nsO2 94 %\nHCO3- 24.1 mmol/L\nctHb 10.1 g/dL",
     None, {"ph": 7.32, "paco2_mmhg": round(6.7 * MMHG_PER_KPA, 1), "pao2_mmhg": 72.0, "sao2": 0.94,
            "hco3_mmol_l": 24.1, "hb_g_dl": 10.1}),
    ("pH 7,32\npCO2 6,7 kPa\npO2 9,6 kPa", None,
     {"ph": 7.32, "paco2_mmhg": round(6.7 * MMHG_PER_KPA, 1), "pao2_mmhg": round(9.6 * MMHG_PER_KPA, 1)}),
    ("PO2 72 mmHg\npH 7.40\nPCO2 40 mmHg", None, {"pao2_mmhg": 72.0, "ph": 7.40, "paco2_mmhg": 40.0}),
    ("pH: 7.45\npCO2: 35 mmHg\npO2: 88 mmHg", None, {"ph": 7.45, "paco2_mmhg": 35.0, "pao2_mmhg": 88.0}),
    ("pH = 7.28\npaCO2 = 58 mmHg\npaO2 = 61 mmHg", None, {"ph": 7.28, "paco2_mmhg": 58.0, "pao2_mmhg": 61.0}),
    ("pO2 72\npCO2 45\npH 7.40", "mmHg", {"pao2_mmhg": 72.0, "paco2_mmhg": 45.0, "ph": 7.40}),
    ("pO2 9.6\npCO2 5.9\npH 7.40", "kPa",
     {"pao2_mmhg": round(9.6 * MMHG_PER_KPA, 1), "paco2_mmhg": round(5.9 * MMHG_PER_KPA, 1), "ph": 7.40}),
    ("pCO2 45\npH 7.40", None, {"paco2_mmhg": 45.0, "ph": 7.40}),  # 45 kPa is impossible: only mmHg fits
    ("sO2 96\npH 7.38", None, {"sao2": 0.96, "ph": 7.38}),  # above 1: per cent
    ("SaO2 0.93\npH 7.38", None, {"sao2": 0.93, "ph": 7.38}),
    ("O2sat 91 %\npH 7.36", None, {"sao2": 0.91, "ph": 7.36}),
    ("Hb 101 g/L\npH 7.36", None, {"hb_g_dl": 10.1, "ph": 7.36}),
    ("Hb 128\npH 7.36", None, {"hb_g_dl": 12.8, "ph": 7.36}),  # above 25: g/L
    ("ctHb 6.2 mmol/L\npH 7.36", None, {"hb_g_dl": 10.0, "ph": 7.36}),  # x 1.611 g/dL per mmol/L
    ("pH 7.31\n\n   \npCO2 52 mmHg", None, {"ph": 7.31, "paco2_mmhg": 52.0}),  # blank lines
    ("BLOOD GAS (arterial)\nPatient: invented test\npH 7.31\nBE(ecf) -2.1 mmol/L\nLac 1.4 mmol/L\npCO2 52 mmHg",
     None, {"ph": 7.31, "paco2_mmhg": 52.0}),  # junk and results Ventcast does not use
    ("pH(T) 7.31\npO2(T) 70 mmHg", None, {"ph": 7.31, "pao2_mmhg": 70.0}),
    ("pH 7.31\npCO2 52mmHg\npO2 70torr", None, {"ph": 7.31, "paco2_mmhg": 52.0, "pao2_mmhg": 70.0}),
    ("HCO3 22\npH 7.31", None, {"hco3_mmol_l": 22.0, "ph": 7.31}),
    ("etCO2 38 mmHg\npH 7.31", None, {"petco2_mmhg": 38.0, "ph": 7.31}),
    ("  pH    7.31  \n\tpCO2\t52\tmmHg", None, {"ph": 7.31, "paco2_mmhg": 52.0}),
]


@pytest.mark.parametrize("text,gas_unit,expected", READ_EXACTLY)
def test_paste_reads_exactly(text, gas_unit, expected):
    got = read_pasted(text, gas_unit=gas_unit)
    assert got.values == pytest.approx(expected) and set(got.values) == set(expected)
    assert not got.questions
    # Every value read is reported with its line and the unit it was read in.
    assert len(got.read) == len(expected)
    for r in got.read:
        assert r["line"] >= 1 and r["text"] in text


def test_paste_lists_what_it_did_not_understand_and_what_it_does_not_use():
    got = read_pasted("BLOOD GAS\npH 7.31\nLac 1.4 mmol/L\nqwerty 12 xyz\npCO2 52 mmHg")
    assert [n for n, _t in got.not_understood] == [1, 4]
    assert [n for n, _t in got.not_used] == [3]
    assert "line 4: not understood" in got.summary() and "line 3: not used by Ventcast" in got.summary()


@pytest.mark.parametrize("text,question", [
    ("pO2 72", "PaO2 72 in mmHg or kPa"),  # 72 kPa is possible on FiO2 1.0
    ("pCO2 12", "PaCO2 12 in mmHg or kPa"),
    ("ctHb 9.8", "Hb 9.8 in g/dL or mmol/L"),
])
def test_paste_asks_when_a_unit_could_be_either(text, question):
    got = read_pasted(text)
    assert got.questions and question in got.questions[0] and not got.values


@pytest.mark.parametrize("text,field,needle", [
    ("pO2 72 mmHg\npO2 70 mmHg", "pasted lines 1 and 2", "two values for PaO2"),
    ("pH 7.31\npH(T) 7.30", "pasted lines 1 and 2", "two values for pH"),
    ("pH 9.1", "pasted line 1", "outside the accepted range 6.5 to 8"),
    ("pO2 72 kPa\npCO2 900 mmHg", "pasted line 2", "outside the accepted range 10 to 150 mmHg"),
    ("pH 7.31 mmHg", "pasted line 1", "pH has no unit"),
    ("sO2 94 mmHg", "pasted line 1", "accepted: % or a fraction"),
    ("pO2 72 g/dL", "pasted line 1", "accepted units: mmHg or kPa"),
    ("pO2 < 20 mmHg", "pasted line 1", "only a bound"),
    ("Hb 10 mmHg", "pasted line 1", "accepted: g/dL, g/L or mmol/L"),
])
def test_paste_refuses_with_the_line_named(text, field, needle):
    with pytest.raises(CaseError) as err:
        read_pasted(text)
    assert err.value.field == field and needle in str(err.value)


# --- the loop on the command line ----------------------------------------------------------------

NEW = ["--sex", "male", "--height-cm", "178", "--weight-kg", "85", "--condition", "ards", "--set", "mode=volume",
       "--set", "fio2=0.6", "--set", "peep_cmh2o=10", "--set", "vt_ml=450", "--set", "rr_per_min=20",
       "--set", "inspiratory_time_s=0.9"]


def test_bedside_loop_on_the_command_line(tmp_path, capsys):
    """new -> add-gas -> apply -> add-gas (pasted) -> check --format json: the stored forecast at the gas's
    minute of the course, its range and inside/outside, and the tally."""
    case = tmp_path / "p.ventcast.json"
    assert main(["new", "--out", str(case)] + NEW) == 0
    assert load(case)["observations"] == []
    assert main(["predict", str(case)]) == 2  # nothing to fit yet: said, not a traceback
    assert "no blood gas yet" in capsys.readouterr().err
    assert main(["add-gas", str(case), "--pao2-mmhg", "64", "--paco2-kpa", "6.4", "--ph", "7.33", "--sao2", "0.91",
                 "--pplat-cmh2o", "27", "--at", "2026-03-14T08:00Z"]) == 0
    assert load(case)["observations"][0]["paco2_mmhg"] == round(6.4 * MMHG_PER_KPA, 1)
    assert main(["apply", str(case), "--set", "peep_cmh2o=14", "--at", "2026-03-14T08:30Z"]) == 0
    after = load(case)
    assert after["settings"]["peep_cmh2o"] == 14 and len(after["settings_history"]) == 1
    stored = after["settings_history"][0]["forecast"]
    paste = tmp_path / "gas.txt"
    paste.write_text("pH 7,30\npCO2 6.9 kPa\npO2 79 mmHg\nsO2 94 %\nLac 1.1 mmol/L\n")
    assert main(["add-gas", str(case), "--paste", str(paste), "--at", "2026-03-14T09:00Z"]) == 0
    capsys.readouterr()
    assert main(["check", str(case), "--format", "json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["pair_count"] == 1 and set(out) >= {"pairs", "inside_count", "pair_count", "caution"}
    pair = out["pairs"][0]
    assert set(pair) >= {"applied_at", "settings", "gas_taken_at", "minutes_after_change", "measured", "forecast",
                         "likely_range", "inside"}
    assert pair["minutes_after_change"] == 30.0
    # The forecast at minute 30 of the stored course (an independent interpolation of the stored series).
    import numpy as np
    minutes = np.asarray(stored["course"]["minutes"])
    for key in ("pao2_mmhg", "paco2_mmhg", "ph"):
        expected = float(np.interp(30.0, minutes, stored["course"][key]))
        assert pair["forecast"][key] == pytest.approx(expected, abs=0.6 if key != "ph" else 0.006)
        lo, hi = pair["likely_range"][key]
        assert pair["inside"][key] == (lo <= pair["measured"][key] <= hi)
    assert out["inside_count"] == int(all(pair["inside"].values()))


def _bytes(path):
    return path.read_bytes()


@pytest.mark.parametrize("args,field", [
    (["--pao2-mmhg", "10", "--paco2-mmhg", "40", "--ph", "7.4"], "blood gas: pao2_mmhg"),
    (["--pao2-mmhg", "800", "--paco2-mmhg", "40", "--ph", "7.4"], "blood gas: pao2_mmhg"),
    (["--pao2-mmhg", "70", "--paco2-mmhg", "5", "--ph", "7.4"], "blood gas: paco2_mmhg"),
    (["--pao2-mmhg", "70", "--paco2-mmhg", "40", "--ph", "9"], "blood gas: ph"),
    (["--pao2-mmhg", "70", "--paco2-mmhg", "40", "--ph", "7.4", "--sao2", "94"], "blood gas: sao2"),
    (["--pao2-mmhg", "70", "--paco2-mmhg", "40", "--ph", "7.4", "--hco3", "90"], "blood gas: hco3_mmol_l"),
    (["--pao2-mmhg", "70", "--paco2-mmhg", "40", "--ph", "7.4", "--petco2-mmhg", "200"], "blood gas: petco2_mmhg"),
    (["--pao2-mmhg", "70", "--paco2-mmhg", "40", "--ph", "7.4", "--pplat-cmh2o", "70"], "blood gas: pplat_cmh2o"),
    (["--pao2-mmhg", "70", "--paco2-mmhg", "40", "--ph", "7.4", "--vte-ml", "5000"], "blood gas: vte_ml"),
    (["--pao2-mmhg", "70", "--paco2-mmhg", "40", "--ph", "7.4", "--hb-g-dl", "30"], "blood gas: Hb"),
    (["--pao2-mmhg", "600", "--paco2-mmhg", "40", "--ph", "7.4"], "blood gas: pao2_mmhg"),  # above alveolar at FiO2 0.6
    (["--paco2-mmhg", "40", "--ph", "7.4"], "--pao2-mmhg"),
    (["--pao2-mmhg", "70", "--ph", "7.4"], "--paco2-mmhg"),
    (["--pao2-mmhg", "70", "--paco2-mmhg", "40"], "--ph"),
    (["--pao2-mmhg", "70", "--pao2-kpa", "9", "--paco2-mmhg", "40", "--ph", "7.4"], "--pao2-kpa"),
    (["--pao2-mmhg", "70", "--paco2-mmhg", "40", "--ph", "7.4", "--at", "yesterday"], "blood gas: taken_at"),
    (["--pao2-mmhg", "70", "--paco2-mmhg", "40", "--ph", "7.4", "--at", "2026-03-14T08:00"], "blood gas: taken_at"),
    (["--pao2-mmhg", "70", "--paco2-mmhg", "40", "--ph", "7.4", "--at", "2999-01-01T00:00Z"], "blood gas: taken_at"),
    (["--pao2-mmhg", "70", "--paco2-mmhg", "40", "--ph", "7.4", "--set", "fio2=2"], "trial settings.fio2"),
    (["--pao2-mmhg", "70", "--paco2-mmhg", "40", "--ph", "7.4", "--set", "peep_cmh2o=40"], "trial settings.peep_cmh2o"),
    (["--pao2-mmhg", "70", "--paco2-mmhg", "40", "--ph", "7.4", "--set", "colour=blue"], "--set"),
])
def test_add_gas_refusals_name_the_field_and_change_nothing(tmp_path, capsys, args, field):
    case = tmp_path / "p.ventcast.json"
    case.write_text(dumps(load_demo("ards-moderate")))
    before = _bytes(case)
    assert main(["add-gas", str(case)] + args) == 2
    err = capsys.readouterr().err
    assert f"invalid input: {field}" in err, err
    assert _bytes(case) == before and list(tmp_path.iterdir()) == [case]


@pytest.mark.parametrize("change,field", [
    (("--height-cm", "90"), "patient.height_cm"), (("--weight-kg", "500"), "patient.weight_kg"),
    (("--age-years", "5"), "patient.age_years"), (("--hb-g-dl", "40"), "patient.hb_g_dl"),
    (("--temperature-c", "45"), "patient.temperature_c"), (("--barometric-mmhg", "100"), "patient.barometric_mmhg"),
    (("--set", "fio2=1.5"), "trial settings.fio2"), (("--set", "rr_per_min=0"), "trial settings.rr_per_min"),
    (("--set", "vt_ml=5000"), "trial settings.vt_ml"),
])
def test_new_refusals_name_the_field_and_write_nothing(tmp_path, capsys, change, field):
    args = list(NEW)
    if change[0] == "--set":  # replace that setting
        key = change[1].split("=")[0]
        args = [change[1] if a.startswith(key + "=") else a for a in args]
    elif change[0] in args:
        args[args.index(change[0]) + 1] = change[1]
    else:
        args += list(change)
    assert main(["new", "--out", str(tmp_path / "n.ventcast.json")] + args) == 2
    assert f"invalid input: {field}" in capsys.readouterr().err
    assert not any(tmp_path.iterdir())


def test_new_needs_every_current_setting(tmp_path, capsys):
    args = [a for a in NEW if a != "inspiratory_time_s=0.9"]
    args = [a for i, a in enumerate(args) if not (a == "--set" and (i + 1 == len(args) or args[i + 1] == "--set"))]
    assert main(["new", "--out", str(tmp_path / "n.ventcast.json")] + args) == 2
    assert "--set inspiratory_time_s: required for a new case" in capsys.readouterr().err


@pytest.mark.parametrize("args,field", [
    (["--set", "peep_cmh2o=40"], "trial settings.peep_cmh2o"),
    ([], "--set"),
    (["--set", "peep_cmh2o=12", "--at", "2020-01-01T00:00"], "applied at"),
    (["--set", "peep_cmh2o=12", "--at", "2999-01-01T00:00Z"], "applied at"),
])
def test_apply_refusals_name_the_field_and_change_nothing(tmp_path, capsys, args, field):
    case = tmp_path / "p.ventcast.json"
    case.write_text(dumps(load_demo("ards-moderate")))
    before = _bytes(case)
    assert main(["apply", str(case)] + args) == 2
    assert f"invalid input: {field}" in capsys.readouterr().err
    assert _bytes(case) == before


def test_a_change_is_refused_unless_after_the_last_and_the_stored_forecast_is_never_touched():
    case = load_demo("ards-moderate")
    forecast = {"steady": {"pao2_mmhg": 70.0, "paco2_mmhg": 50.0, "ph": 7.3},
                "likely_range": {"pao2_mmhg": [60.0, 80.0], "paco2_mmhg": [45.0, 55.0], "ph": [7.25, 7.35]},
                "course": {k: [0.0, 60.0] if k == "minutes" else [1.0, 1.0] for k in
                           ("minutes", "pao2_mmhg", "paco2_mmhg", "ph", "pao2_low", "pao2_high", "paco2_low",
                            "paco2_high", "ph_low", "ph_high")}}
    s = dict(case["settings"], peep_cmh2o=12.0)
    one = apply_change(case, s, forecast, "2026-03-14T09:00Z")
    with pytest.raises(CaseError) as err:
        apply_change(one, dict(s, fio2=0.5), forecast, "2026-03-14T09:00Z")
    assert err.value.field == "applied at"
    two = add_observation(one, {"taken_at": "2026-03-14T10:30Z", "pao2_mmhg": 75.0, "paco2_mmhg": 48.0, "ph": 7.33})
    assert two["settings_history"] == one["settings_history"]
    check = forecast_check(two)
    # 90 min after the change: past the stored 60-min course, so the steady state and its range.
    pair = check["pairs"][0]
    assert pair["forecast"] == forecast["steady"] and pair["inside"] == {"pao2_mmhg": True, "paco2_mmhg": True,
                                                                          "ph": True}
    # A gas entered as taken at other settings is not held against this change's forecast.
    three = add_observation(two, {"taken_at": "2026-03-14T10:40Z", "pao2_mmhg": 75.0, "paco2_mmhg": 48.0, "ph": 7.33,
                                  "settings": dict(case["settings"])})
    assert forecast_check(three)["pair_count"] == 1


def test_a_version_1_file_reads_unchanged_and_is_saved_as_the_current_version(tmp_path):
    case = load_demo("ards-moderate")
    assert case["version"] == 1 and "settings_history" not in case
    assert json.loads(dumps(case))["version"] == 3


def test_new_case_function_refuses_what_the_command_refuses():
    with pytest.raises(CaseError) as err:
        new_case({"sex": "other", "height_cm": 170, "weight_kg": 70}, load_demo("ards-moderate")["settings"])
    assert err.value.field == "patient.sex"
