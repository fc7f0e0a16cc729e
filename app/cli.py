"""The ``ventcast`` command line.

Exit status: 0 success, 2 invalid input (stderr names the field, the value and
the accepted range), 3 when the model cannot fit or converge. Never a traceback.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from . import CAUTION
from .bedside import bedside_indices
from .casefile import DEMO_NAMES, CaseError, demo_text, load_demo, loads, write_atomic

EXIT_OK, EXIT_INTERNAL, EXIT_INPUT, EXIT_MODEL = 0, 1, 2, 3

#: Verbs whose capability has not landed yet: they refuse honestly.
NOT_YET = {
    "open": "the window",
    "predict": "the patient fit and forecast",
    "fit": "the patient fit",
    "plan": "the goal search",
    "wean": "step-down plans",
    "walkthrough": "walkthroughs",
    "report": "PDF reports",
    "import-fhir": "FHIR import",
}


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
    ("Driving pressure", "driving_pressure_cmh2o", "cmH2O", 0),
    ("Crs", "compliance_ml_per_cmh2o", "mL/cmH2O", 0),
    ("Ventilatory ratio", "ventilatory_ratio", "", 2),
    ("Base excess", "base_excess_mmol_l", "mmol/L", 1),
    ("Berlin category", "berlin_category", "", 0),
]


def _cmd_demo(args) -> int:
    if args.out:
        out = Path(args.out)
        out.mkdir(parents=True, exist_ok=True)
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
        for title, key, unit, digits in BEDSIDE_ROWS:
            print(f"  {title:<22} {_fmt(item['bedside'][key], digits):>9} {unit}")
        print()
    print("Bedside indices of each demo case's latest observation; forecasts arrive with the model fit.")
    print(CAUTION)
    return EXIT_OK


def _not_yet(verb):
    def run(args) -> int:
        print(f"ventcast {verb}: not available yet ({NOT_YET[verb]} has not been built in this version).",
              file=sys.stderr)
        return EXIT_INPUT
    return run


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="ventcast", description="Forecast blood gases after a ventilator setting change. "
                     + CAUTION)
    sub = parser.add_subparsers(dest="verb", parser_class=_Parser)
    demo = sub.add_parser("demo", help="show the built-in invented demo cases, or write them with --out")
    demo.add_argument("--out", help="folder to write the demo case files into")
    demo.add_argument("--format", choices=("table", "json"), default="table")
    demo.set_defaults(run=_cmd_demo)
    for verb in NOT_YET:
        p = sub.add_parser(verb, help=f"{NOT_YET[verb]} (not available yet)")
        p.add_argument("rest", nargs=argparse.REMAINDER)
        p.set_defaults(run=_not_yet(verb))
    return parser


def main(argv=None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    if not argv:
        argv = ["open"]
    if argv[0] in NOT_YET:
        return _not_yet(argv[0])(None)
    try:
        args = build_parser().parse_args(argv)
        return args.run(args)
    except CaseError as exc:
        print(f"ventcast: invalid input: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except ValueError as exc:
        print(f"ventcast: invalid input: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        return 130
    except Exception as exc:  # never a traceback; say plainly that this is our fault
        print(f"ventcast: internal error ({type(exc).__name__}: {exc}); please report it", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main())
