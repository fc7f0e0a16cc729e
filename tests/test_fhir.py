"""FHIR import: an invented bundle (tests/data) with kPa and mmHg values, a venous sample, pulse oximetry
and an unknown code becomes the expected case; malformed bundles are refused with the JSON path named
and nothing is written.

LOINC codes are those of the shared notes data-exchange-codes.md (checked against HL7 implementation
guides and LOINC term pages; 19834-1, breath rate setting, is marked "memory" there). Unit factors:
1 kPa = 7.50062 mmHg (common practice); haemoglobin 112 g/L = 11.2 g/dL.
"""

import hashlib
import json
from pathlib import Path

import pytest

from ventcast.app import casefile
from ventcast.app.cli import main
from ventcast.app.fhir import BundleError, import_bundle

DATA = Path(__file__).resolve().parent / "data" / "fhir-abg-bundle.json"


def _bundle():
    return json.loads(DATA.read_text())


def test_bundle_imports_to_the_expected_case():
    case, report = import_bundle(DATA.read_text())
    assert case["patient"] == {"sex": "male", "height_cm": 180.0, "weight_kg": 86.0, "temperature_c": 37.6,
                               "hb_g_dl": 11.2, "barometric_mmhg": 760.0, "age_years": None,
                                "condition": "other"}
    first, second = case["observations"]
    assert first["taken_at"] == "2026-04-02T06:10:00Z"
    # kPa -> mmHg, at the precision the value was reported with (one decimal): 69.0 and 45.8, not 69.0057
    assert first["pao2_mmhg"] == round(9.2 * 7.50062, 1) and first["paco2_mmhg"] == round(6.1 * 7.50062, 1)
    assert first["ph"] == 7.36 and first["sao2"] == 0.93 and first["hco3_mmol_l"] == 25.1
    assert first["pplat_cmh2o"] == 24.0
    assert first["settings"]["fio2"] == 0.55  # 55 % -> fraction; in force at 05:30
    assert second["taken_at"] == "2026-04-02T09:40:00+01:00"
    assert (second["pao2_mmhg"], second["paco2_mmhg"], second["ph"], second["petco2_mmhg"]) == (71.0, 44.0, 7.38, 36.0)
    assert second["settings"]["fio2"] == 0.45  # "0.45 %" is a fraction: the scale follows the value
    assert "sao2" not in second  # the 95 % at that time is pulse oximetry (59408-5)
    assert case["settings"]["peep_cmh2o"] == 10 and case["settings"]["vt_ml"] == 450 and case["settings"]["mode"] == "volume"
    skipped = {s["code"]: s["why"] for s in report["skipped"]}
    assert "never used as arterial" in skipped["2705-2"] and "never used as arterial" in skipped["2021-4"]
    assert "pulse oximetry" in skipped["2708-6"]
    assert skipped["2524-7"] == "not a code Ventcast imports"
    assert "1925-7" in skipped  # base excess recognised, not stored
    assert {i["code"] for i in report["imported"]} >= {"2703-7", "2019-8", "2744-1", "2708-6", "1960-4", "718-7",
                                                        "3150-0", "19994-3", "20077-4", "20112-9", "19834-1",
                                                        "76259-1", "19891-1", "76334-2"}


def test_venous_values_alone_are_never_a_blood_gas():
    b = _bundle()
    b["entry"] = [e for e in b["entry"] if e["resource"].get("code", {}).get("coding", [{}])[0].get("code")
                  not in ("2703-7", "2019-8", "2744-1")]
    with pytest.raises(BundleError, match="no arterial blood gas"):
        import_bundle(json.dumps(b))


def test_unspecified_blood_counts_as_arterial_only_when_the_specimen_says_so():
    b = _bundle()
    for e in b["entry"]:
        c = e["resource"].get("code", {}).get("coding", [{}])[0]
        if c.get("code") == "2703-7" and e["resource"]["effectiveDateTime"].endswith("+01:00"):
            c["code"] = "11556-8"
    case, report = import_bundle(json.dumps(b))
    assert len(case["observations"]) == 1  # the second gas lost its PaO2: not a blood gas
    assert any(s["code"] == "11556-8" and "never used as arterial" in s["why"] for s in report["skipped"])
    assert any("no arterial pao2_mmhg" in s["why"] for s in report["skipped"])
    for e in b["entry"]:
        if e["resource"].get("code", {}).get("coding", [{}])[0].get("code") == "11556-8":
            e["resource"]["specimen"] = {"reference": "#s1", "display": "Arterial blood specimen"}
            e["resource"]["contained"] = [{"resourceType": "Specimen", "id": "s1"}]
    # display text never decides: no SNOMED CT code, still not arterial
    case, _ = import_bundle(json.dumps(b))
    assert len(case["observations"]) == 1
    for e in b["entry"]:
        if e["resource"].get("code", {}).get("coding", [{}])[0].get("code") == "11556-8":
            e["resource"]["contained"][0]["type"] = {"coding": [{"system": "http://snomed.info/sct",
                                                                 "code": "122552005"}]}
    case, _ = import_bundle(json.dumps(b))
    assert case["observations"][1]["pao2_mmhg"] == 71.0


def _gas_at(b, suffix):
    """The arterial PO2, PCO2 and pH entries of the gas whose time ends with ``suffix``."""
    return [e for e in b["entry"] if e["resource"].get("code", {}).get("coding", [{}])[0].get("code")
            in ("2703-7", "2019-8", "2744-1") and e["resource"]["effectiveDateTime"].endswith(suffix)]


@pytest.mark.parametrize("code,kind", [("122555007", "venous"), ("122554006", "capillary")])
def test_specimen_code_venous_or_capillary_is_never_arterial(code, kind):
    """Issue 21 item 7: the specimen decides by SNOMED CT code, even under an arterial LOINC code and
    whatever its text says ("Capillary blood (arterialized)", "Venous blood - not arterial")."""
    b = _bundle()
    b["entry"].append({"fullUrl": "urn:uuid:spec-1", "resource": {
        "resourceType": "Specimen", "id": "spec-1", "type": {
            "coding": [{"system": "http://snomed.info/sct", "code": code}], "text": "arterial blood"}}})
    for e in _gas_at(b, "+01:00"):
        e["resource"]["specimen"] = {"reference": "urn:uuid:spec-1", "display": "Arterial"}
    case, report = import_bundle(json.dumps(b))
    assert len(case["observations"]) == 1
    assert sum(f"{kind} specimen" in s["what"] for s in report["skipped"]) == 3


def test_comparator_values_are_never_taken_as_measured():
    """Issue 21 item 8: PaO2 '> 71' is a bound; the gas lacks a PaO2 and is not imported as 71."""
    b = _bundle()
    _gas_at(b, "+01:00")[0]["resource"]["valueQuantity"]["comparator"] = ">"
    case, report = import_bundle(json.dumps(b))
    assert len(case["observations"]) == 1
    assert any("a bound, not a measured value" in s["why"] for s in report["skipped"])


def test_preliminary_is_noted_and_bad_status_refused():
    b = _bundle()
    _gas_at(b, "+01:00")[0]["resource"]["status"] = "preliminary"
    _case, report = import_bundle(json.dumps(b))
    assert sum("preliminary" in it.get("note", "") for it in report["imported"]) == 1
    _gas_at(b, "+01:00")[0]["resource"]["status"] = 5
    with pytest.raises(BundleError, match=r"status.*5"):
        import_bundle(json.dumps(b))


def test_saturation_fraction_with_percent_unit_is_a_fraction():
    """Issue 21 item 9: SaO2 0.93 with unit '%' is 93 %, not 0.93 % (as for FiO2)."""
    b = _bundle()
    q = _entry("2708-6")(b)["resource"]["valueQuantity"]
    q.update(value=0.93, code="%", unit="%")
    case, _ = import_bundle(json.dumps(b))
    assert any(o.get("sao2") == 0.93 for o in case["observations"])


def test_contradictory_values_and_patients_are_refused_naming_both():
    """Issue 21 item 10: two PaO2 at one time, or two Patients of different sex, are refused."""
    b = _bundle()
    twin = json.loads(json.dumps(_gas_at(b, "+01:00")[0]))
    twin["resource"]["valueQuantity"]["value"] = 250
    b["entry"].append(twin)
    with pytest.raises(BundleError, match="contradicts"):
        import_bundle(json.dumps(b))
    b = _bundle()
    other = json.loads(json.dumps(b["entry"][0]))
    other["resource"]["gender"] = "female" if b["entry"][0]["resource"]["gender"] == "male" else "male"
    b["entry"].append(other)
    with pytest.raises(BundleError, match="gender .* contradicts"):
        import_bundle(json.dumps(b))


@pytest.mark.parametrize("key", ["hasMember", "category", "contained"])
def test_list_elements_of_the_wrong_type_are_refused_with_the_path(key):
    """Issue 21 item 17: hasMember 5 or category 5 named, not a TypeError."""
    b = _bundle()
    r = _entry("2703-7")(b)["resource"]
    r[key] = 5
    if key == "contained":
        r["specimen"] = {"reference": "#x"}
    if key == "hasMember":
        r["code"]["coding"][0]["code"] = "24336-0"
    with pytest.raises(BundleError, match=key):
        import_bundle(json.dumps(b))


def test_out_of_range_values_are_named_by_their_bundle_path():
    b = _bundle()
    _entry("2744-1")(b)["resource"]["valueQuantity"]["value"] = 9.5
    with pytest.raises(BundleError) as err:
        import_bundle(json.dumps(b))
    assert err.value.field == f"bundle.entry[{_index('2744-1')}].resource" and "ph" in str(err.value)


def test_into_adds_to_a_copy_and_leaves_the_existing_case_untouched(tmp_path, capsys):
    existing = tmp_path / "ards.ventcast.json"
    existing.write_text(casefile.demo_text("ards-moderate"))
    before = hashlib.sha256(existing.read_bytes()).hexdigest()
    out = tmp_path / "merged.ventcast.json"
    assert main(["import-fhir", str(DATA), "--into", str(existing), "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "Imported:" in text and "Skipped:" in text and "LOINC 2705-2" in text
    assert hashlib.sha256(existing.read_bytes()).hexdigest() == before
    merged = casefile.load(out)
    assert len(merged["observations"]) == 4
    assert merged["patient"]["height_cm"] == 165  # the existing patient is kept
    assert merged["patient"]["hb_g_dl"] == 11.2   # the newer haemoglobin is taken
    # The bundle's differing patient facts are named, with what was done; its latest settings are current.
    assert "the bundle's height 180.0 differs from the case's 165" in text and "the case's is kept" in text
    assert merged["settings"] == merged["observations"][-1]["settings"]
    assert main(["import-fhir", str(DATA), "--into", str(existing), "--out", str(existing)]) == 2
    assert "never overwritten" in capsys.readouterr().err


def _mutate(fn):
    b = _bundle()
    fn(b)
    return json.dumps(b)


def _entry(code):
    def find(b):
        return next(e for e in b["entry"] if e["resource"].get("code", {}).get("coding", [{}])[0].get("code") == code)
    return find


def _set(code, path, value):
    def fn(b):
        node = _entry(code)(b)["resource"]
        for p in path[:-1]:
            node = node[p]
        node[path[-1]] = value
    return fn


def _index(code):
    b = _bundle()
    return next(i for i, e in enumerate(b["entry"]) if e["resource"].get("code", {}).get("coding", [{}])[0].get("code") == code)


BAD = [
    ("not json", lambda: "{bundle", "not valid JSON"),
    ("not a bundle", lambda: json.dumps({"resourceType": "Patient"}), "bundle.resourceType"),
    ("entry not a list", lambda: _mutate(lambda b: b.update(entry={})), "bundle.entry"),
    ("entry without resource", lambda: _mutate(lambda b: b["entry"].append({"fullUrl": "x"})), "resource"),
    ("observation without code", lambda: _mutate(lambda b: _entry("2703-7")(b)["resource"].pop("code")),
     f"bundle.entry[{_index('2703-7')}].resource.code.coding"),
    ("empty coding", lambda: _mutate(_set("2703-7", ["code", "coding"], [])), "code.coding"),
    ("coding without code", lambda: _mutate(lambda b: _entry("2703-7")(b)["resource"]["code"]["coding"][0].pop("code")),
     "coding[0].code"),
    ("value missing", lambda: _mutate(lambda b: _entry("2703-7")(b)["resource"].pop("valueQuantity")),
     f"bundle.entry[{_index('2703-7')}].resource.valueQuantity"),
    ("value a string", lambda: _mutate(_set("2019-8", ["valueQuantity", "value"], "6.1")), "valueQuantity.value"),
    ("value boolean", lambda: _mutate(_set("2744-1", ["valueQuantity", "value"], True)), "valueQuantity.value"),
    ("unknown pressure unit", lambda: _mutate(_set("2703-7", ["valueQuantity", "code"], "psi")), "unit 'psi'"),
    ("unknown hb unit", lambda: _mutate(_set("718-7", ["valueQuantity", "code"], "mg/dL")), "unit 'mg/dL'"),
    ("fio2 between 1 and 21", lambda: _mutate(_set("19994-3", ["valueQuantity", "value"], 5)), "neither a fraction"),
    ("fio2 unit", lambda: _mutate(_set("19994-3", ["valueQuantity", "code"], "L/min")), "unit 'L/min'"),
    ("saturation over 100", lambda: _mutate(_set("2708-6", ["valueQuantity", "value"], 130)), "saturation"),
    ("time missing", lambda: _mutate(lambda b: _entry("2744-1")(b)["resource"].pop("effectiveDateTime")),
     "effectiveDateTime"),
    ("time not iso", lambda: _mutate(_set("2744-1", ["effectiveDateTime"], "yesterday")), "not an ISO 8601"),
    ("time without zone", lambda: _mutate(_set("2744-1", ["effectiveDateTime"], "2026-04-02T06:10:00")), "time zone"),
    ("unclear mode", lambda: _mutate(_set("20124-4", ["valueCodeableConcept"], {"text": "adaptive"})), "mode"),
    ("gender unknown", lambda: _mutate(lambda b: b["entry"][0]["resource"].update(gender="other")), "gender"),
    ("no patient sex", lambda: _mutate(lambda b: b["entry"].pop(0)), "patient's sex"),
    ("no height", lambda: _mutate(lambda b: b["entry"].remove(_entry("8302-2")(b))), "height_cm"),
    ("no settings", lambda: _mutate(lambda b: b["entry"].remove(_entry("20077-4")(b))), "settings.peep_cmh2o"),
    ("impossible pao2 at fio2", lambda: _mutate(_set("2703-7", ["valueQuantity", "value"], 90.0)), "impossible at FiO2"),
    ("ph out of range", lambda: _mutate(_set("2744-1", ["valueQuantity", "value"], 9.5)), "ph"),
]


@pytest.mark.parametrize("name,text,needle", BAD, ids=[b[0] for b in BAD])
def test_malformed_bundles_are_refused_with_the_path_and_nothing_is_written(tmp_path, capsys, name, text, needle):
    bundle = tmp_path / "bundle.json"
    bundle.write_text(text())
    out = tmp_path / "new.ventcast.json"
    code = main(["import-fhir", str(bundle), "--out", str(out)])
    err = capsys.readouterr().err
    assert code == 2, err
    assert needle in err
    assert "Traceback" not in err
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bundle.json"]


def test_entered_in_error_is_skipped():
    b = _bundle()
    _entry("2708-6")(b)["resource"]["status"] = "entered-in-error"
    case, report = import_bundle(json.dumps(b))
    assert "sao2" not in case["observations"][0]
    assert any(s["why"] == "status entered-in-error" for s in report["skipped"])


def _without(codes):
    def fn(b):
        b["entry"] = [e for e in b["entry"] if e["resource"].get("code", {}).get("coding", [{}])[0].get("code")
                      not in codes]
    return fn


def test_a_new_case_without_a_coded_mode_or_ti_takes_them_from_the_command(tmp_path, capsys):
    """Issue 15: a bundle written by a general-purpose FHIR library often lacks the mode (20124-4) and Ti
    (76334-2); a new case from it is refused, naming them, unless --mode and --ti-s are given."""
    bundle = tmp_path / "b.json"
    bundle.write_text(_mutate(_without({"20124-4", "76334-2"})))
    out = tmp_path / "new.ventcast.json"
    assert main(["import-fhir", str(bundle), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "settings.inspiratory_time_s (LOINC 76334-2)" in err and "settings.mode (LOINC 20124-4)" in err
    assert not out.exists()
    assert main(["import-fhir", str(bundle), "--out", str(out), "--mode", "volume", "--ti-s", "9"]) == 2
    assert "--ti-s: value 9 is outside the accepted range 0.2 to 5 s" in capsys.readouterr().err
    assert main(["import-fhir", str(bundle), "--out", str(out), "--mode", "volume", "--ti-s", "0.9"]) == 0
    case = casefile.load(out)
    assert case["settings"]["mode"] == "volume" and case["settings"]["inspiratory_time_s"] == 0.9


def test_age_comes_from_the_birth_date():
    def born(b):
        patient = next(e["resource"] for e in b["entry"] if e["resource"]["resourceType"] == "Patient")
        patient["birthDate"] = "1961-05-20"
    case, _report = import_bundle(_mutate(born))
    assert case["patient"]["age_years"] == 64  # on 2026-04-02, before the birthday in May

    def bad(b):
        next(e["resource"] for e in b["entry"] if e["resource"]["resourceType"] == "Patient")["birthDate"] = "20/05/61"
    with pytest.raises(BundleError) as err:
        import_bundle(_mutate(bad))
    assert "birthDate" in err.value.field and "not a FHIR date" in str(err.value)
