"""The ``ventcast`` command line.

Exit status: 0 success, 2 invalid input (stderr names the field, the value and
the accepted range), 3 when the model cannot fit or converge. Never a traceback.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from ventcast.physiology.planning.search import CONSTRAINT_NAMES
from ventcast.physiology.mechanics.spontaneous import AVERAGED

from . import CAUTION
from .bedside import bedside_indices
from .casefile import (DEMO_NAMES, SETTING_RANGES, SPONTANEOUS_MODES, CaseError, check_output_file, check_output_files,
                       demo_text, load, load_demo, read_text, write_atomic)
from .engine import MARGIN_LABELS, ModelError, ie_text, recheck_sentence
from .precision import rounded, sao2_text

EXIT_OK, EXIT_INTERNAL, EXIT_INPUT, EXIT_MODEL = 0, 1, 2, 3



class _Parser(argparse.ArgumentParser):
    def error(self, message):  # argparse would exit 2 with usage; keep our wording
        raise CaseError("(command line)", message)


def _fmt(v, digits=2):
    if v is None:
        return "-"
    if isinstance(v, str):
        return v
    return f"{v:.{digits}f}"


BEDSIDE_ROWS = [
    ("P/F ratio", "pf_ratio_mmhg", "mmHg", 0),
    ("Alveolar PO2 (R 0.8)", "alveolar_po2_mmhg", "mmHg", 0),
    ("A-a gradient", "aa_gradient_mmhg", "mmHg", 0),
    ("PBW", "pbw_kg", "kg", 1),
    ("VT", "vt_ml_per_kg_pbw", "mL/kg PBW", 1),
    ("Driving pressure (Pplat - set PEEP)", "driving_pressure_cmh2o", "cmH2O", 0),
    ("Crs", "compliance_ml_per_cmh2o", "mL/cmH2O", 0),
    ("Ventilatory ratio", "ventilatory_ratio", "", 2),
    ("Base excess", "base_excess_mmol_l", "mmol/L", 1),
    ("Berlin category", "berlin_category", "", 0),
]


def _cmd_demo(args) -> int:
    if args.out:
        out = check_output_files("--out", args.out, [f"{n}.ventcast.json" for n in DEMO_NAMES], force=True)
        out.mkdir(exist_ok=True)
        for name in DEMO_NAMES:
            write_atomic(out / f"{name}.ventcast.json", demo_text(name))
        if args.format == "json":
            print(json.dumps({"written": [str(out / f"{n}.ventcast.json") for n in DEMO_NAMES],
                              "caution": CAUTION}))
        else:
            for name in DEMO_NAMES:
                print(f"wrote {out / (name + '.ventcast.json')}")
            print(CAUTION)
        return EXIT_OK
    summary = {}
    for name in DEMO_NAMES:
        case = load_demo(name)
        summary[name] = {"label": case.get("label", ""), "bedside": bedside_indices(case)}
    if args.format == "json":
        print(json.dumps({"demo_cases": summary, "caution": CAUTION}, indent=2))
        return EXIT_OK
    for name, item in summary.items():
        print(f"{name}: {item['label']}")
        width = max(len(row[0]) for row in BEDSIDE_ROWS)
        for title, key, unit, digits in BEDSIDE_ROWS:
            print(f"  {title:<{width}} {_fmt(item['bedside'][key], digits):>9} {unit}")
        print()
    print("Bedside indices of each demo case's latest observation; forecasts arrive with the model fit.")
    print(CAUTION)
    return EXIT_OK


def _load_case(args) -> dict:
    if getattr(args, "demo", None):
        if args.case:
            raise CaseError("(command line)", "give either CASE or --demo NAME, not both")
        return load_demo(args.demo)
    if not args.case:
        raise CaseError("CASE", "a case file is required (or --demo NAME; accepted names: " + ", ".join(DEMO_NAMES) + ")")
    return load(args.case)


def _num(v, d=1):
    return "-" if v is None else f"{v:.{d}f}"


STEADY_ROWS = [("PaO2", "pao2_mmhg", "mmHg", 0), ("PaCO2", "paco2_mmhg", "mmHg", 1), ("pH", "ph", "", 2),
               ("SaO2", "sao2", "%", 0), ("PetCO2", "petco2_mmhg", "mmHg", 1), ("VD/VT", "vd_vt", "", 2),
               ("Qs/Qt (shunt)", "shunt_fraction", "", 2), ("Pplat", "pplat_cmh2o", "cmH2O", 1),
               ("Ppeak", "ppeak_cmh2o", "cmH2O", 1), ("Driving pressure (Pplat - total PEEP)", "driving_pressure_cmh2o", "cmH2O", 1),
               ("Intrinsic PEEP", "intrinsic_peep_cmh2o", "cmH2O", 1),
               ("Mechanical power", "mechanical_power_j_min", "J/min", 1), ("VT", "vt_ml_per_kg_pbw", "mL/kg PBW", 1),
               ("P/F ratio", "pf_ratio_mmhg", "mmHg", 0), ("Cardiac output", "cardiac_output_l_min", "L/min", 1),
               ("Alveolar ventilation", "alveolar_ventilation_l_min", "L/min", 1)]


def _cmd_predict(args) -> int:
    from .engine import forecast_case
    case = _load_case(args)
    if not 1 <= args.minutes <= 240:
        raise CaseError("--minutes", f"value {args.minutes:g} is outside the accepted range 1 to 240 min")
    out = rounded(forecast_case(case, args.set, minutes=args.minutes))
    if args.format == "json":
        print(json.dumps(out))
        return EXIT_OK
    s = out["settings"]
    if s["mode"] in SPONTANEOUS_MODES:
        support = (f"pressure support {s['pressure_support_cmh2o']:g} cmH2O (cycling at "
                   f"{100 * s['cycle_off_fraction']:.0f} % of peak flow)" if s["mode"] == "pressure-support" else "CPAP")
        print(f"Trial settings: {support}, FiO2 {s['fio2']:.2f}, PEEP {s['peep_cmh2o']:g} cmH2O, backup RR "
              f"{s['rr_per_min']:g}/min")
    else:
        drive = (f"VT {s['vt_ml']:g} mL" if s["mode"] == "volume" else f"Pinsp {s['inspiratory_pressure_cmh2o']:g} cmH2O")
        print(f"Trial settings: {s['mode']} control, FiO2 {s['fio2']:.2f}, PEEP {s['peep_cmh2o']:g} cmH2O, {drive}, "
              f"RR {s['rr_per_min']:g}/min, Ti {s['inspiratory_time_s']:g} s")
    f = out["fit"]
    print(f"Lung fit: shunt {f['shunt_fraction']:.2f}, V/Q log SD {f['vq_log_sd']:.2f}, alveolar dead space "
          f"{f['alveolar_dead_space_fraction']:.2f}, VCO2 {f['vco2_ml_min']:.0f} mL/min, cardiac output "
          f"{f['cardiac_output_l_min']:.1f} L/min ({f['message']})")
    print("Model assumes: " + "; ".join(f["assumptions"]))
    print()
    width = max(len(row[0]) for row in STEADY_ROWS)
    heading = ("Forecast (steady state)" if not out.get("spontaneous") else
               f"Forecast ({out['spontaneous']['drawn'].replace('_', ' ')})")
    print(f"{heading:<{width + 2}} {'value':>9}  likely range (90 %)")
    rng = out["likely_range"]
    for title, key, unit, d in STEADY_ROWS:
        band = ""
        scale = 100.0 if key == "sao2" else 1.0  # SaO2 in whole per cent (app.precision)
        if key in ("pao2_mmhg", "paco2_mmhg", "ph", "sao2"):
            lo, hi = rng[key]
            band = f"{scale * lo:.{d}f} to {scale * hi:.{d}f}"
        value = out["steady"][key]
        print(f"  {title:<{width}} {_num(None if value is None else scale * value, d):>9} {unit:<9} {band}")
    if out.get("spontaneous"):
        _print_spontaneous(out["spontaneous"])
    if out["settings"] == out.get("current_settings"):
        print("\nThe trial equals the current settings: no change is expected.")
    elif out.get("recheck_after_min") is not None:
        print("\n" + recheck_sentence(out["recheck_after_min"]))
    if out["next_best_measurement"]:
        nb = out["next_best_measurement"][0]
        print(f"Next best measurement: {nb['probe']} - {nb['why']}.")
    if out["alerts"]:
        print("\nLimits and notes:")
        marks = {"danger": "[!!]", "caution": "[! ]", "info": "[i ]"}
        for a in out["alerts"]:
            print(f"  {marks[a['severity']]} {a['message']}")
    print()
    print(CAUTION)
    return EXIT_OK


def _print_spontaneous(sp: dict) -> None:
    """The two bounds of a forecast on pressure support or CPAP, side by side, and the effort now."""
    e = sp["effort_now"]
    print(f"\nBreathing on support: now VT {e['vt_ml']:.0f} mL at {e['rr_per_min']:.0f}/min (RSBI {e['rsbi']:.0f}); "
          f"effort Pmus {e['pmus_cmh2o']:.1f} cmH2O ({e['pmus_basis']}); the breath model, held to the measured VT, "
          f"needs {e['pmus_model_cmh2o']:.1f}; dynamic transpulmonary driving pressure "
          + ("-" if e["dpl_dyn_cmh2o"] is None else f"{e['dpl_dyn_cmh2o']:.1f} cmH2O ({e['dpl_dyn_basis']})"))
    rows = (("VT", "vt_ml", "mL", 0), ("rate", "rr_per_min", "/min", 0), ("RSBI", "rsbi", "/min/L", 0),
            ("Pmus", "pmus_cmh2o", "cmH2O", 1), ("PaCO2", "paco2_mmhg", "mmHg", 1), ("pH", "ph", "", 2),
            ("PaO2", "pao2_mmhg", "mmHg", 0))
    b1, b2 = sp["bounds"]["effort_unchanged"], sp["bounds"]["drive_preserved"]
    print(f"  {'':<7} {'effort unchanged':>17} {'drive preserved':>17}")
    for title, key, unit, d in rows:
        print(f"  {title:<7} {_num(b1[key], d):>17} {_num(b2[key], d):>17}  {unit}")
    for name, words in (("effort_unchanged", "effort unchanged"), ("drive_preserved", "drive preserved")):
        print(f"  {words}: {sp['meaning'][name]}")
        b = sp["bounds"][name]
        if not b["attainable"]:
            print(f"  \u26a0 {words}: even an effort of 40 cmH2O does not keep the alveolar ventilation of now")
        if not b["periodic"]:
            print(f"  \u26a0 {words}: the breaths do not settle to one repeating breath (alternating large and small "
                  f"breaths): the numbers are the mean of the last {AVERAGED}")


def _cmd_fit(args) -> int:
    from .engine import current_settings, fit_block, fit_case, now_block
    case = _load_case(args)
    _patient, _obs, result = fit_case(case)
    block = fit_block(result, current_settings(case))
    out = rounded({"now": now_block(case), "fit": block, "caution": CAUTION})
    if args.format == "json":
        print(json.dumps(out))
        return EXIT_OK
    names = [("shunt (at current settings)", "shunt_fraction", None), ("non-recruitable shunt", "shunt_fixed_fraction", "shunt_fixed"),
             ("recruitable lung", "recruitable_lung_fraction", "recruitable"), ("V/Q log SD", "vq_log_sd", "log_sd"),
             ("alveolar dead space", "alveolar_dead_space_fraction", None), ("VCO2 [mL/min]", "vco2_ml_min", "vco2"),
             ("VO2 [mL/min]", "vo2_ml_min", "vo2"), ("cardiac output [L/min]", "cardiac_output_l_min", None),
             ("compliance [mL/cmH2O]", "compliance_ml_per_cmh2o", "c_max"),
             ("resistance [cmH2O/L/s]", "resistance_cmh2o_l_s", "resistance"),
             ("base excess [mmol/L]", "base_excess_mmol_l", "base_excess"),
             ("respiratory quotient", "respiratory_quotient", "rq"),
             ("series dead space [mL]", "series_dead_space_ml", None),
             ("  below the Y-piece [mL]", "anatomic_dead_space_ml", "anatomic_dead_space"),
             # The two constants that set how PaCO2 answers a higher Pplat (drawn, not fixed): shown so that
             # a PEEP or VT forecast's PaCO2 can be traced to them.
             ("upper inflection [cmH2O]", "upper_inflection_cmh2o", "inflection"),
             ("overdistension dead space", "overdistension_dead_space_fraction", "overdistension_dead_space")]
    if block["condition"] == "obstructive":
        names.append(("low-V/Q mode (share of flow)", "low_vq_fraction", "low_vq_fraction"))
    print(f"Lung fit: {block['message']}")
    for title, key, rkey in names:
        band = ""
        if rkey:
            lo, hi = block["likely_range"][rkey]
            band = f"likely range {lo:.2f} to {hi:.2f}"
        print(f"  {title:<30} {block[key]:>9.2f}  {band}")
    for m in block["identifiability"] + block["warnings"]:
        print(f"  [i ] {m}")
    print("Model assumptions:")
    for m in block["assumptions"]:
        print(f"  - {m}")
    print()
    print(CAUTION)
    return EXIT_OK


def _cmd_open(args) -> int:
    size = _parse_size(args.size)
    case = load(args.case) if args.case else load_demo(args.demo or "ards-moderate")
    # Refuse a bad file or --set here, with the field named, before any window opens.
    from .engine import apply_sets
    apply_sets(case, args.set)
    if args.screenshot and not args.screenshot.lower().endswith(".png"):
        raise CaseError("--screenshot", f"value {args.screenshot!r} must name a .png file")
    if args.screenshot:
        check_output_file("--screenshot", args.screenshot)
    from .window import run
    quit_ms = None if args.quit_after is None else int(args.quit_after * 1000)
    return run(case_path=args.case, demo=args.demo, screenshot=args.screenshot, size=size, quit_after_ms=quit_ms,
               sets=args.set, tab=args.tab, case=case)


def _parse_size(text: str) -> tuple[int, int]:
    try:
        w, h = (int(x) for x in text.lower().split("x"))
    except ValueError:
        raise CaseError("--size", f"value {text!r} is not of the form WIDTHxHEIGHT, e.g. 1600x1000") from None
    if not (400 <= w <= 8000 and 300 <= h <= 8000):
        raise CaseError("--size", f"value {text!r} is outside the accepted range 400x300 to 8000x8000")
    return w, h


def oxygenation_either_text(m: dict) -> str:
    """Why an option with SpO2 (or PaO2) outside its range still meets the oxygenation goal: the goal is met
    by either one in range (ARDS Network 2000). '' when both are in range, both out, or only one is set."""
    if "spo2" not in m or "pao2_mmhg" not in m or (m["spo2"] >= 0) == (m["pao2_mmhg"] >= 0):
        return ""
    met, other = ("PaO2", "SpO2") if m["pao2_mmhg"] >= 0 else ("SpO2", "PaO2")
    return (f"oxygenation goal met by {met} ({other} outside its range): the goal is SpO2 or PaO2 in range "
            f"(ARDS Network 2000)")


def _cmd_plan(args) -> int:
    from .engine import plan_case, settings_text
    case = _load_case(args)
    if not 0.5 <= args.probability < 1.0:
        raise CaseError("--probability", f"value {args.probability:g} is outside the accepted range 0.5 to below 1")
    out = rounded(plan_case(case, required_probability=args.probability))
    if args.format == "json":
        print(json.dumps(out))
        return EXIT_OK
    print(f"Options for the case's goals ({out['message']}).")
    print(f"Screened {out['screened']} candidate settings; gas exchange for {out['gas_exchange_evaluated']}; "
          f"probability over the fit's parameter draws for {out['probability_evaluated']}.")
    if out["binding_constraint"]:
        print(f"Binding constraint: {out['binding_constraint']}.")
    for i, o in enumerate(out["options"], 1):
        st = o["steady"]
        mark = "meets every goal" if o["probability_all_goals"] >= out["required_probability"] else "closest"
        print(f"\n{i}. {settings_text(o['settings'])}")
        print(f"   changes: {', '.join(o['changes']) or 'none'}")
        print(f"   {ie_text(o['i_to_e'])}")
        for caution in o["cautions"]:
            if not caution.startswith("I:E"):
                print(f"   {caution}")
        print(f"   PaO2 {st['pao2_mmhg']:.0f} mmHg, SaO2 {sao2_text(st['sao2'])}, PaCO2 {st['paco2_mmhg']:.1f} mmHg, pH "
              f"{st['ph']:.2f}, Pplat {st['pplat_cmh2o']:.1f}, driving pressure (Pplat - total PEEP) {st['driving_pressure_cmh2o']:.1f} cmH2O, "
              f"mechanical power {st['mechanical_power_j_min']:.1f} J/min")
        print("   margins to the goals and limits: " + ", ".join(
            f"{MARGIN_LABELS[k][0]} {v:+.{MARGIN_LABELS[k][2]}f} {MARGIN_LABELS[k][1]}".rstrip()
            for k, v in o["margins"].items()))
        either = oxygenation_either_text(o["margins"])
        if either:
            print(f"   {either}")
        misses = ", ".join(f"{CONSTRAINT_NAMES.get(k, k)} {100 * v:.0f} %" if v >= 0.01 else
                           f"{CONSTRAINT_NAMES.get(k, k)} <1 %" for k, v in o["misses"].items())
        print(f"   probability of meeting every goal and limit: {100 * o['probability_all_goals']:.0f} % ({mark})"
              + (f"; misses in the draws: {misses}" if misses else ""))
    print()
    print(CAUTION)
    return EXIT_OK


def _cmd_wean(args) -> int:
    from .engine import wean_case
    case = _load_case(args)
    if not 0.21 <= args.target_fio2 <= 1.0:
        raise CaseError("--target-fio2", f"value {args.target_fio2:g} is outside the accepted range 0.21 to 1.0")
    if not 0 <= args.target_peep <= 30:
        raise CaseError("--target-peep", f"value {args.target_peep:g} is outside the accepted range 0 to 30 cmH2O")
    for name, v, lo, hi in (("--spontaneous-rr", args.spontaneous_rr, 1, 80),
                            ("--spontaneous-vt-ml", args.spontaneous_vt_ml, 50, 2000)):
        if v is not None and not lo <= v <= hi:
            raise CaseError(name, f"value {v:g} is outside the accepted range {lo} to {hi}")
    out = rounded(wean_case(case, table=args.table, target_fio2=args.target_fio2, target_peep=args.target_peep,
                            spontaneous_rr=args.spontaneous_rr, spontaneous_vt_ml=args.spontaneous_vt_ml))
    if args.format == "json":
        print(json.dumps(out))
        return EXIT_OK
    if out.get("mode") in SPONTANEOUS_MODES:
        _print_support_wean(out)
        return EXIT_OK
    how = f"following the ARDS Network {args.table} table" if args.table else "model-driven"
    print(f"Step-down plan ({how}) toward FiO2 <= {args.target_fio2:.2f} and PEEP <= {args.target_peep:g} cmH2O: "
          f"{out['message']}.")
    for i, st in enumerate(out["steps"], 1):
        v, r = st["steady"], st["likely_range"]
        print(f"\n{i}. {st['change']} ({st['why']})")
        print(f"   SaO2 {sao2_text(v['sao2'])} ({sao2_text(r['sao2'][0])} to {sao2_text(r['sao2'][1])}), PaO2 {v['pao2_mmhg']:.0f} mmHg "
              f"({r['pao2_mmhg'][0]:.0f} to {r['pao2_mmhg'][1]:.0f}), PaCO2 {v['paco2_mmhg']:.1f} mmHg, pH {v['ph']:.2f}")
        hold = "-" if st["hold_min"] is None else f"{st['hold_min']:.0f} min"
        print(f"   hold at least {hold} ({st['hold_basis']}), then check; {st['stop_if']}")
    print("\nReadiness for a spontaneous breathing trial at the last step:")
    for c in out["readiness"]:
        mark = {True: "[ok]", False: "[no]", None: "[ ?]"}[c["met"]]
        value = "" if c["value"] is None else f" (value {c['value']:g})"
        print(f"  {mark} {c['criterion']}{value} - {c['source']}" + (f"; {c['note']}" if c.get("note") else ""))
    print()
    print(CAUTION)
    return EXIT_OK


def _print_support_wean(out: dict) -> None:
    """The step-down of pressure support as text: each step's two bounds side by side."""
    e = out["effort_now"]
    print(f"Step-down of pressure support toward the breathing trial (support <= "
          f"{out['target']['pressure_support_cmh2o']:g} cmH2O on PEEP <= {out['target']['peep_cmh2o']:g}): "
          f"{out['message']}.")
    print(f"Now: pressure support {e['pressure_support_cmh2o']:g} cmH2O, VT {e['vt_ml']:.0f} mL at "
          f"{e['rr_per_min']:.0f}/min (RSBI {e['rsbi']:.0f}), effort Pmus {e['pmus_cmh2o']:.1f} cmH2O "
          f"({e['pmus_basis']}).")
    for i, st in enumerate(out["steps"], 1):
        print(f"\n{i}. {st['change']}")
        for name, words in (("effort_unchanged", "effort unchanged"), ("drive_preserved", "drive preserved")):
            b = st["bounds"][name]
            print(f"   {words:<17} VT {b['vt_ml']:.0f} mL, rate {b['rr_per_min']:.0f}/min, RSBI {b['rsbi']:.0f}, "
                  f"Pmus {b['pmus_cmh2o']:.1f} cmH2O, PaCO2 {b['paco2']:.1f} mmHg, pH {b['ph']:.2f}, SaO2 "
                  f"{sao2_text(b['sao2'])}" + (f"  [breaks: {'; '.join(b['breaks'])}]" if b["breaks"] else ""))
        print(f"   {st['stop_if']}")
    if out["stopped_because"]:
        print(f"\nStopped {out['stopped_because']}.")
    elif out["reached_target"]:
        print("\nThe breathing-trial conditions are reached at the last step.")
    if out.get("note"):
        print(out["note"])
    print()
    print(CAUTION)


def _check_output_path(option: str, path: Path, force: bool) -> None:
    """Before anything is computed or written: the folder exists, and an existing file is replaced
    only with --force (a directory or a special file never)."""
    check_output_file(option, path, force=True)
    if path.is_file() and not force:
        raise CaseError(option, f"value {str(path)!r} exists; give --force to replace it")


def _cmd_import_fhir(args) -> int:
    from .casefile import dumps, read_text
    from .fhir import import_bundle
    text = read_text(args.bundle, "BUNDLE", max_bytes=10_000_000)
    into = load(args.into) if args.into else None
    out = Path(args.out)
    if not out.name.endswith(".ventcast.json"):
        raise CaseError("--out", f"value {args.out!r} must name a .ventcast.json file")
    if args.into and out.resolve() == Path(args.into).resolve():
        raise CaseError("--out", "must differ from --into: the existing case is never overwritten")
    _check_output_path("--out", out, args.force)
    if args.ti_s is not None and not 0.2 <= args.ti_s <= 5.0:
        raise CaseError("--ti-s", f"value {args.ti_s:g} is outside the accepted range 0.2 to 5 s")
    case, report = import_bundle(text, into=into, mode=args.mode, ti_s=args.ti_s)
    write_atomic(out, dumps(case))
    if args.format == "json":
        print(json.dumps({"out": str(out), "observations": len(case["observations"]), **report, "caution": CAUTION}))
        return EXIT_OK
    print(f"Wrote {out} ({len(case['observations'])} observation(s)).")
    print("Imported:")
    for it in report["imported"]:
        note = f"  ({it['note']})" if it.get("note") else ""
        print(f"  LOINC {it['code']:<8} -> {it['into']} = {it['value']}{note}")
    print("Skipped:")
    for it in report["skipped"]:
        print(f"  {('LOINC ' + it['code']) if it['code'] else '':<14} {it['what']}: {it['why']}")
    for w in report.get("warnings", []):
        print(f"Note: {w}")
    print()
    print(CAUTION)
    return EXIT_OK


def _cmd_report(args) -> int:
    case = _load_case(args)
    out = Path(args.out)
    if out.suffix.lower() != ".pdf":
        raise CaseError("--out", f"value {args.out!r} must name a .pdf file")
    check_output_file("--out", out)
    if args.csv:  # every output path is checked before anything is written
        check_output_files("--csv", args.csv, ("course.csv", "observations.csv"))
    trials = {"A": args.set}
    for name, sets in (("B", args.set_b), ("C", args.set_c)):
        if sets:
            trials[name] = sets
    from .engine import apply_sets
    for sets in trials.values():
        apply_sets(case, sets)  # refuse bad values before any work
    import os
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    from PySide6 import QtWidgets
    app = QtWidgets.QApplication.instance() or QtWidgets.QApplication(["ventcast"])  # noqa: F841 (charts and layout)
    from .report import build_report
    res = build_report(case, trials, out, csv_dir=args.csv, with_plan=args.with_options)
    print(f"Wrote {res['pdf']} ({res['pages']} page(s))" + (f" and {', '.join(res['csv'])}" if res["csv"] else "") + ".")
    print(CAUTION)
    return EXIT_OK


def _cmd_walkthrough(args) -> int:
    from .walkthrough import Run, apply_actions_file, breathing_lines, load_script, score_text
    if args.new:
        if args.script or args.headless:
            raise CaseError("--new", "opens the script editor on a new file: give no SCRIPT and no --headless")
        if not args.new.endswith(".walkthrough.json"):
            raise CaseError("--new", f"value {args.new!r} must name a .walkthrough.json file")
        target = check_output_file("--new", args.new)
        from .window import run as run_window
        return run_window(editor=str(target), quit_after_ms=None if args.quit_after is None else int(args.quit_after * 1000))
    if not args.script:
        raise CaseError("SCRIPT", "a walkthrough script is required (a file or a built-in name), or --new FILE")
    script, folder = load_script(args.script)
    if not args.headless:
        from .window import run as run_window
        return run_window(demo=None, walkthrough=(script, folder))
    run = Run(script, folder, seed=args.seed)
    until = run.duration if args.until is None else args.until
    if not 0 < until <= run.duration:
        raise CaseError("--until", f"value {until:g} is outside the accepted range above 0 to {run.duration:g} min")
    if args.actions:
        apply_actions_file(run, read_text(args.actions, "--actions"))
    try:
        out = run.debrief(until)
    except ArithmeticError as exc:
        raise ModelError(str(exc)) from None
    if args.format == "json":
        print(json.dumps(out))
        return EXIT_OK
    print(f"Walkthrough: {out['title']} (to minute {until:g})")
    for t in out["timeline"]:  # in time order
        print(f"  {t['minute']:5.1f} min  {t['what']}: {t['detail']}")
    c = out["course"]
    print(f"  end: PaO2 {c['pao2_mmhg'][-1]:.0f} mmHg, PaCO2 {c['paco2_mmhg'][-1]:.1f} mmHg, pH {c['ph'][-1]:.2f}")
    if out["breathing"]:
        print("The patient's breathing on support:")
        for line in breathing_lines(out):
            print(f"  {line}")
    print(f"Score: {score_text(out)}")
    for s in out["score"]["items"]:
        print(f"  [{'--' if s['met'] is None else 'ok' if s['met'] else 'no'}] {s['expected']} - {s['why']}")
    print()
    print(CAUTION)
    return EXIT_OK


def _cmd_desktop_entry(args) -> int:
    from .desktop import write_desktop_entry
    written = write_desktop_entry(user=args.user, prefix=args.prefix)
    if args.format == "json":
        print(json.dumps(written))
        return EXIT_OK
    print(f"Wrote the menu entry {written['desktop_file']}")
    print(f"Wrote the icon       {written['icon']}")
    print("Ventcast now appears in the application menu (Science); some desktops show it after the next log-in.")
    print(CAUTION)
    return EXIT_OK


def _write_case(args, case: dict, target) -> None:
    """Write the case atomically: in place, or to --out (refused if it exists, unless --force)."""
    from .casefile import dumps
    out = check_output_file("--out", args.out, force=getattr(args, "force", False)) if args.out else target
    write_atomic(out, dumps(case))


def _cmd_new(args) -> int:
    from .entry import new_case, settings_from_sets
    patient = {"sex": args.sex, "height_cm": args.height_cm, "weight_kg": args.weight_kg, "age_years": args.age_years,
               "hb_g_dl": args.hb_g_dl, "temperature_c": args.temperature_c, "barometric_mmhg": args.barometric_mmhg}
    settings = settings_from_sets(patient, args.set)
    case = new_case(patient, settings, label=args.label, condition=args.condition)
    _write_case(args, case, None)
    print(json.dumps({"written": args.out, "caution": CAUTION}) if args.format == "json" else
          f"Wrote {args.out}: a new case with no blood gas yet; add one with `ventcast add-gas {args.out} ...`.\n\n{CAUTION}")
    return EXIT_OK


#: add-gas options: (option, case-file field, kPa option or None, help).
GAS_OPTIONS = (("--pao2-mmhg", "pao2_mmhg", "--pao2-kpa", "PaO2 [mmHg] (or --pao2-kpa)"),
               ("--paco2-mmhg", "paco2_mmhg", "--paco2-kpa", "PaCO2 [mmHg] (or --paco2-kpa)"),
               ("--ph", "ph", None, "pH"), ("--sao2", "sao2", None, "SaO2 [fraction 0-1]"),
               ("--hco3", "hco3_mmol_l", None, "HCO3 [mmol/L]"),
               ("--petco2-mmhg", "petco2_mmhg", "--petco2-kpa", "end-tidal PCO2 [mmHg] (or --petco2-kpa)"),
               ("--pplat-cmh2o", "pplat_cmh2o", None, "plateau pressure [cmH2O]"),
               ("--ppeak-cmh2o", "ppeak_cmh2o", None, "peak pressure [cmH2O]"),
               ("--vte-ml", "vte_ml", None, "exhaled VT [mL]"), ("--ve-l-min", "ve_l_min", None, "minute ventilation [L/min]"),
               ("--hb-g-dl", "hb_g_dl", None, "haemoglobin with the gas [g/dL] (becomes the patient's Hb)"),
               ("--spontaneous-rr-per-min", "spontaneous_rr_per_min", None,
                "the patient's own rate on pressure support or CPAP [/min] (required there, with --vte-ml)"),
               ("--p01-cmh2o", "p01_cmh2o", None, "airway occlusion pressure at 0.1 s [cmH2O]"),
               ("--delta-pocc-cmh2o", "delta_pocc_cmh2o", None,
                "expiratory occlusion swing [cmH2O], negative as measured (write --delta-pocc-cmh2o=-6)"))


def _cmd_add_gas(args) -> int:
    from .engine import apply_sets
    from .entry import add_observation, kpa_to_mmhg
    from .paste import read_pasted
    case = load(args.case)
    obs, source = {}, {}
    if args.paste:
        text = sys.stdin.read(20_001) if args.paste == "-" else read_text(args.paste, "--paste", max_bytes=20_000)
        pasted = read_pasted(text, gas_unit=args.paste_gas_unit, hb_unit=args.paste_hb_unit)
        if pasted.questions:
            raise CaseError("--paste", f"{pasted.questions[0]} (answer with --paste-gas-unit mmHg|kPa or "
                                       f"--paste-hb-unit g/dL|g/L|mmol/L)")
        for key, value in pasted.values.items():
            obs[key], source[key] = value, "--paste"
    for option, key, kpa_option, _help in GAS_OPTIONS:
        for opt, conv in ((option, float), (kpa_option, kpa_to_mmhg)):
            value = getattr(args, opt.lstrip("-").replace("-", "_")) if opt else None
            if value is None:
                continue
            if key in obs:
                raise CaseError(opt, f"value {value:g} given twice (also by {source[key]}); give it once")
            obs[key], source[key] = conv(value), opt
    for opt, key in (("--pao2-mmhg", "pao2_mmhg"), ("--paco2-mmhg", "paco2_mmhg"), ("--ph", "ph")):
        if key not in obs:
            raise CaseError(opt, "required (a blood gas needs PaO2, PaCO2 and pH)")
    if args.at:
        obs["taken_at"] = args.at
    if args.set:
        obs["settings"] = apply_sets(case, args.set)
    new = add_observation(case, obs)
    _write_case(args, new, args.case)
    where = args.out or args.case
    if args.format == "json":
        print(json.dumps({"written": where, "observations": len(new["observations"]), "caution": CAUTION}))
    else:
        print(f"Added the blood gas to {where} ({len(new['observations'])} observation(s)).\n\n{CAUTION}")
    return EXIT_OK


def _cmd_apply(args) -> int:
    from .engine import apply_sets, fit_case, forecast_fitted, settings_text
    from .entry import apply_change, stored_forecast
    case = load(args.case)
    if not args.set:
        raise CaseError("--set", "required: the settings the ventilator was changed to (KEY=VALUE, repeatable)")
    trial = apply_sets(case, args.set)
    _p, _o, result = fit_case(case)
    out = forecast_fitted(case, result, trial, with_band=True, with_next=False)
    new = apply_change(case, trial, stored_forecast(out), args.at)
    _write_case(args, new, args.case)
    change = new["settings_history"][-1]
    st = change["forecast"]["steady"]
    if args.format == "json":
        print(json.dumps(rounded({"written": args.out or args.case, "applied_at": change["applied_at"],
                                  "settings": trial, "forecast": change["forecast"]["steady"],
                                  "likely_range": change["forecast"]["likely_range"], "caution": CAUTION})))
    else:
        print(f"Recorded at {change['applied_at']}: {settings_text(trial)}.\nForecast kept for the check: PaO2 "
              f"{st['pao2_mmhg']:.0f} mmHg, PaCO2 {st['paco2_mmhg']:.1f} mmHg, pH {st['ph']:.2f} at steady state.\n"
              f"\n{CAUTION}")
    return EXIT_OK


def _cmd_check(args) -> int:
    from .entry import CHECKED, forecast_check, tally_text
    check = rounded(forecast_check(load(args.case)))
    if args.format == "json":
        print(json.dumps(check))
        return EXIT_OK
    print(f"Forecast check: {tally_text(check)}.")
    for p in check["pairs"]:
        print(f"\n  gas {p['gas_taken_at']}, {p['minutes_after_change']:g} min after the change of {p['applied_at']}:")
        for key, name, unit, d in CHECKED:
            lo, hi = p["likely_range"][key]
            mark = "inside" if p["inside"][key] else "OUTSIDE"
            print(f"    {name:<6} measured {p['measured'][key]:.{d}f}, forecast {p['forecast'][key]:.{d}f} "
                  f"({lo:.{d}f} to {hi:.{d}f}) {unit:<5} {mark}")
    print(f"\n{CAUTION}")
    return EXIT_OK


#: The --set help: every settings key a trial accepts, with its unit and accepted range (from the code's ranges).
SET_HELP = ("change one setting for the trial: KEY=VALUE, repeatable. Keys: mode (volume, pressure, pressure-support "
            "or cpap), fio2 (0.21-1.0), vt_ml (2-20 mL/kg PBW; volume mode), "
            + ", ".join(f"{k} ({lo:g}-{hi:g} {unit})" for k, (lo, hi, unit) in SETTING_RANGES.items())
            + "; inspiratory_time_s shorter than the breath")


def _in_place_options(p) -> None:
    """--out, --force and --format of a command that changes a case file in place unless --out is given."""
    p.add_argument("--out", default=None, help="write the new case here instead of changing CASE")
    p.add_argument("--force", action="store_true", help="replace --out if it exists")
    p.add_argument("--format", choices=("table", "json"), default="table")


def build_parser() -> argparse.ArgumentParser:
    from . import version
    parser = _Parser(prog="ventcast", description="Forecast blood gases after a ventilator setting change. "
                     + CAUTION)
    parser.add_argument("--version", action="version", version=f"ventcast {version()}")
    sub = parser.add_subparsers(dest="verb", parser_class=_Parser)
    demo = sub.add_parser("demo", help="show the built-in invented demo cases, or write them with --out")
    demo.add_argument("--out", help="folder to write the demo case files into")
    demo.add_argument("--format", choices=("table", "json"), default="table")
    demo.set_defaults(run=_cmd_demo)
    for verb, run, help_ in (("predict", _cmd_predict, "fit the case, then forecast the trial settings"),
                             ("fit", _cmd_fit, "fit the case and show the lung model with likely ranges")):
        p = sub.add_parser(verb, help=help_)
        p.add_argument("case", nargs="?", help="case file (.ventcast.json)")
        p.add_argument("--demo", choices=DEMO_NAMES, help="use a built-in demo case instead of CASE")
        p.add_argument("--format", choices=("table", "json"), default="table",
                       help="table for people (default), json for scripts")
        if verb == "predict":
            p.add_argument("--set", action="append", default=[], metavar="KEY=VALUE", help=SET_HELP)
            p.add_argument("--minutes", type=float, default=60.0, help="length of the course [min]")
        p.set_defaults(run=run)
    for verb, run, help_ in (("plan", _cmd_plan, "options: settings that meet the case's goals within the limits"),
                             ("wean", _cmd_wean, "a step-down plan toward readiness for a spontaneous breathing trial")):
        p = sub.add_parser(verb, help=help_)
        p.add_argument("case", nargs="?", help="case file (.ventcast.json)")
        p.add_argument("--demo", choices=DEMO_NAMES, help="use a built-in demo case instead of CASE")
        p.add_argument("--format", choices=("table", "json"), default="table")
        if verb == "plan":
            p.add_argument("--probability", type=float, default=0.9,
                           help="probability of meeting every goal an option needs (default 0.9)")
        else:
            p.add_argument("--table", choices=("lower-peep", "higher-peep"), default=None,
                           help="follow this ARDS Network PEEP/FiO2 table (default: model-driven)")
            p.add_argument("--target-fio2", type=float, default=0.4,
                           help="FiO2 the plan steps down to, at most (0.21-1.0; default 0.4)")
            p.add_argument("--target-peep", type=float, default=8.0,
                           help="PEEP the plan steps down to, at most [cmH2O] (default 8)")
            p.add_argument("--spontaneous-rr", type=float, default=None, help="spontaneous rate for the RSBI [/min]")
            p.add_argument("--spontaneous-vt-ml", type=float, default=None, help="spontaneous VT for the RSBI [mL]")
        p.set_defaults(run=run)
    nw = sub.add_parser("new", help="write a new case: the patient and the current settings (no blood gas yet)")
    nw.add_argument("--out", required=True, help="the case file to write (.ventcast.json)")
    nw.add_argument("--force", action="store_true", help="replace --out if it exists")
    nw.add_argument("--sex", required=True, choices=("female", "male"))
    nw.add_argument("--height-cm", type=float, required=True, help="height [cm] (100-250)")
    nw.add_argument("--weight-kg", type=float, required=True, help="weight [kg] (20-300)")
    nw.add_argument("--age-years", type=float, default=None, help="age [years] (16-110)")
    nw.add_argument("--hb-g-dl", type=float, default=None, help="haemoglobin [g/dL] (4-22; default 12)")
    nw.add_argument("--temperature-c", type=float, default=None, help="temperature [degC] (32-42; default 37)")
    nw.add_argument("--barometric-mmhg", type=float, default=None, help="barometric pressure [mmHg] (450-800; default 760)")
    nw.add_argument("--condition", choices=("ards", "obstructive", "post-operative", "other"), default=None,
                    help="sets the fit's priors (default other)")
    nw.add_argument("--label", default=None, help="a name for the case (no real patient names in shared files)")
    nw.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                    help="the current settings (required: mode, fio2, peep_cmh2o, rr_per_min, inspiratory_time_s, and "
                         "vt_ml or inspiratory_pressure_cmh2o). " + SET_HELP.split(": ", 1)[1])
    nw.add_argument("--format", choices=("table", "json"), default="table")
    nw.set_defaults(run=_cmd_new)
    ag = sub.add_parser("add-gas", help="add a blood gas (and ventilator readings) to a case, atomically")
    ag.add_argument("case", help="case file (.ventcast.json); changed in place unless --out is given")
    for option, _key, kpa_option, help_ in GAS_OPTIONS:
        ag.add_argument(option, type=float, default=None, help=help_)
        if kpa_option:
            ag.add_argument(kpa_option, type=float, default=None, help=f"the same in kPa (instead of {option})")
    ag.add_argument("--at", default=None, help="time taken, ISO 8601 with its zone (default: now)")
    ag.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                    help="settings in force when it was taken, if not the current ones. " + SET_HELP.split(": ", 1)[1])
    ag.add_argument("--paste", metavar="FILE|-", help="read the values from a pasted result ('label value unit' lines)")
    ag.add_argument("--paste-gas-unit", choices=("mmHg", "kPa"), default=None,
                    help="unit of pasted gas pressures written without one")
    ag.add_argument("--paste-hb-unit", choices=("g/dL", "g/L", "mmol/L"), default=None,
                    help="unit of a pasted Hb written without one")
    _in_place_options(ag)
    ag.set_defaults(run=_cmd_add_gas)
    ap = sub.add_parser("apply", help="record that the ventilator was changed, with the forecast made for the change")
    ap.add_argument("case", help="case file (.ventcast.json); changed in place unless --out is given")
    ap.add_argument("--set", action="append", default=[], metavar="KEY=VALUE", help="the new settings. " + SET_HELP.split(": ", 1)[1])
    ap.add_argument("--at", default=None, help="time of the change, ISO 8601 with its zone (default: now)")
    _in_place_options(ap)
    ap.set_defaults(run=_cmd_apply)
    ck = sub.add_parser("check", help="each stored forecast against the blood gas measured after its change")
    ck.add_argument("case", help="case file (.ventcast.json)")
    ck.add_argument("--format", choices=("table", "json"), default="table")
    ck.set_defaults(run=_cmd_check)
    wk = sub.add_parser("walkthrough", help="a scripted teaching case: the window's Walkthrough, or --headless")
    wk.add_argument("script", nargs="?", help="walkthrough script (.walkthrough.json) or a built-in name")
    wk.add_argument("--new", metavar="FILE", help="open the script editor to write a new .walkthrough.json file")
    wk.add_argument("--quit-after", type=float, default=None, metavar="SECONDS", help=argparse.SUPPRESS)
    wk.add_argument("--headless", action="store_true", help="run without the window and print the debrief")
    wk.add_argument("--until", type=float, default=None, help="minute the headless run stops at")
    wk.add_argument("--actions", help="learner actions for a headless run (JSON list)")
    wk.add_argument("--seed", type=int, default=0, help="seed of the analyser noise")
    wk.add_argument("--format", choices=("table", "json"), default="table")
    wk.set_defaults(run=_cmd_walkthrough)
    rp = sub.add_parser("report", help="a PDF trial report (and CSV exports) for the case")
    rp.add_argument("case", nargs="?", help="case file (.ventcast.json)")
    rp.add_argument("--demo", choices=DEMO_NAMES, help="use a built-in demo case instead of CASE")
    rp.add_argument("--set", action="append", default=[], metavar="KEY=VALUE", help="Trial A: " + SET_HELP)
    rp.add_argument("--set-b", action="append", default=[], metavar="KEY=VALUE", help="Trial B (optional)")
    rp.add_argument("--set-c", action="append", default=[], metavar="KEY=VALUE", help="Trial C (optional)")
    rp.add_argument("--out", required=True, help="the PDF to write")
    rp.add_argument("--csv", metavar="DIR", help="also write course.csv and observations.csv into DIR")
    rp.add_argument("--with-options", action="store_true", help="add the goal search's options to the report")
    rp.set_defaults(run=_cmd_report)
    fh = sub.add_parser("import-fhir", help="blood gases and ventilator settings from an HL7 FHIR R4 Bundle")
    fh.add_argument("bundle", help="FHIR R4 Bundle (JSON) of Observation resources")
    fh.add_argument("--out", required=True, help="the case file to write (.ventcast.json)")
    fh.add_argument("--into", help="an existing case: its copy, with the imported observations, goes to --out")
    fh.add_argument("--force", action="store_true", help="replace --out if it exists")
    fh.add_argument("--mode", choices=("volume", "pressure"), default=None,
                    help="ventilation mode of a new case when the bundle has no coded mode (LOINC 20124-4)")
    fh.add_argument("--ti-s", type=float, default=None,
                    help="inspiratory time [s] (0.2-5) of a new case when the bundle has none (LOINC 76334-2)")
    fh.add_argument("--format", choices=("table", "json"), default="table")
    fh.set_defaults(run=_cmd_import_fhir)
    op = sub.add_parser("open", help="open the window on a case (the ards-moderate demo when none is given)")
    op.add_argument("case", nargs="?", help="case file (.ventcast.json)")
    op.add_argument("--demo", choices=DEMO_NAMES, help="open a built-in demo case instead of CASE")
    op.add_argument("--screenshot", metavar="FILE.png", help="render the window offscreen to a PNG and exit")
    op.add_argument("--size", default="1600x1000", metavar="WxH",
                    help="screenshot size in pixels (400x300 to 8000x8000, and at least what the window needs)")
    op.add_argument("--set", action="append", default=[], metavar="KEY=VALUE", help="Trial A: " + SET_HELP)
    op.add_argument("--tab", choices=("limits", "lung-fit", "options", "step-down", "forecast-check"), default="limits",
                    help="right-hand panel shown (with --screenshot, options and step-down are computed first)")
    op.add_argument("--quit-after", type=float, default=None, metavar="SECONDS", help=argparse.SUPPRESS)
    op.set_defaults(run=_cmd_open)
    de = sub.add_parser("desktop-entry", help="add Ventcast to the application menu (a freedesktop .desktop file "
                        "and the icon)")
    de.add_argument("--user", action="store_true", help="for this user only (~/.local/share); "
                    "without it, for every user (/usr/local/share, needs root)")
    de.add_argument("--prefix", type=Path, default=None, help=argparse.SUPPRESS)  # tests: another data folder
    de.add_argument("--format", choices=("table", "json"), default="table")
    de.set_defaults(run=_cmd_desktop_entry)
    return parser


def main(argv=None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    if not argv:
        argv = ["open"]
    try:
        args = build_parser().parse_args(argv)
        return args.run(args)
    except CaseError as exc:
        print(f"ventcast: invalid input: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except ModelError as exc:
        print(f"ventcast: the model could not fit or converge: {exc}", file=sys.stderr)
        return EXIT_MODEL
    except ValueError as exc:
        print(f"ventcast: invalid input: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:  # the reader went away (e.g. piped into head): nothing left to say
        return EXIT_OK
    except OSError as exc:  # the machine refused a read or write (disk full, permissions): not our fault
        where = f" {exc.filename}" if exc.filename else ""
        print(f"ventcast: cannot read or write{where}: {exc.strerror or exc}", file=sys.stderr)
        return EXIT_INPUT
    except Exception as exc:  # never a traceback; say plainly that this is our fault
        print(f"ventcast: internal error ({type(exc).__name__}: {exc}); please report it", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main())
