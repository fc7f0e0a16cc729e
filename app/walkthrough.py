"""Walkthrough scripts (``*.walkthrough.json``) and runs: events, learner actions, draws, score, debrief.

A script is validated against ``resources/schema/walkthrough.schema.json`` (JSON Schema 2020-12),
then by range checks here (event values per kind, minutes within the run, a setting named for
setting goals). Its starting case is a built-in demo (``demo:NAME``), a case file path (relative to
the script) or an inline case. The patient of the run is the case's fitted model (MAP estimate).
Nothing here imports Qt; the window drives a :class:`Run` through its clock.
"""

from __future__ import annotations

import json
import math
import re
from importlib import resources
from pathlib import Path

import jsonschema
import numpy as np

from ventcast.physiology.mechanics.spontaneous import CYCLE_OFF_DEFAULT
from ventcast.physiology.planning.support import breaks
from ventcast.physiology.scenario import EVENT_KINDS, Action, Effort, Event, Support, Timeline

from . import CAUTION
from .casefile import (SPONTANEOUS_MODES, CaseError, DEMO_NAMES, load, load_demo, parse_json, read_text, schema_error,
                       setting_words, validate)
from .engine import apply_sets, case_goals, fit_case, settings_text, spontaneous_now, to_settings

FORMAT = "ventcast.walkthrough"
FOLLOW_FAILED = "the walkthrough patient cannot be followed: "
#: The field of a refusal of a change the patient cannot be followed through.
NOT_FOLLOWED = "walkthrough"
VERSION = 1
BUILT_IN = ("hypoxaemia-needs-peep", "hypercapnia-gas-trapping", "sudden-deterioration", "slow-desaturation",
            "breathing-trial")


#: Each event kind in the words on screen ({v}: its value).
EVENT_WORDS = {"shunt_up": "shunt up by {p:.0f} % of cardiac output", "lung_collapse": "{p:.0f} % of the lung collapses",
               "compliance_down": "compliance falls to {p:.0f} %", "compliance_up": "compliance rises to {p:.0f} %",
               "resistance_up": "airway resistance rises to {p:.0f} %",
               "resistance_down": "airway resistance falls to {p:.0f} %",
               "metabolism_up": "O2 use and CO2 production rise to {p:.0f} %",
               "cardiac_output_down": "cardiac output falls to {p:.0f} %", "circuit_leak": "circuit leak of {p:.0f} %",
               "recruitment_manoeuvre": "recruitment manoeuvre to {v:g} cmH2O"}


def event_words(kind: str, value: float) -> str:
    """An event in the words on screen: ``('resistance_up', 1.3)`` -> 'airway resistance rises to 130 %'."""
    return EVENT_WORDS[kind].format(v=value, p=100.0 * value)


def set_words(assignment: str) -> str:
    """A learner's setting change ``'peep_cmh2o=12'`` in the words on screen ('PEEP 12 cmH2O')."""
    key, _, value = assignment.partition("=")
    try:
        return setting_words(key, float(value))
    except ValueError:
        return setting_words(key, value)


def _schema() -> dict:
    return json.loads(resources.files("ventcast.resources.schema").joinpath("walkthrough.schema.json").read_text("utf-8"))


def _where(parts) -> str:
    out = "script"
    for p in parts:
        out += f"[{p}]" if isinstance(p, int) else f".{p}"
    return out


def built_in_text(name: str) -> str:
    if name not in BUILT_IN:
        raise CaseError("SCRIPT", f"{name!r} is neither a file nor a built-in walkthrough ({', '.join(BUILT_IN)})")
    return resources.files("ventcast.resources.walkthroughs").joinpath(f"{name}.walkthrough.json").read_text("utf-8")


def load_script(ref: str) -> tuple[dict, Path | None]:
    """A validated script from a path or a built-in name; returns (script, folder of the file or None)."""
    path = Path(ref)
    if path.exists():
        return loads_script(read_text(path, "SCRIPT")), path.resolve().parent
    return loads_script(built_in_text(ref)), None


def loads_script(text: str) -> dict:
    doc = parse_json(text, "script")
    if not isinstance(doc, dict):
        raise CaseError("script", "a walkthrough script is a JSON object")
    if isinstance(doc.get("version"), int) and doc["version"] > VERSION and doc.get("format") == FORMAT:
        raise CaseError("script.version", f"version {doc['version']} was written by a newer Ventcast; this one reads "
                                          f"version {VERSION}")
    errors = sorted(jsonschema.Draft202012Validator(_schema()).iter_errors(doc), key=lambda e: list(e.absolute_path))
    if errors:
        e = errors[0]
        if e.validator == "additionalProperties":
            extra = sorted(set(e.instance) - set(e.schema.get("properties", {})))
            raise CaseError(_where(e.absolute_path), f"unknown key {extra[0]!r}")
        raise schema_error(e, _where(e.absolute_path))
    duration = float(doc.get("duration_min", 60.0))
    for i, ev in enumerate(doc["events"]):
        name, (lo, hi), _what = EVENT_KINDS[ev["kind"]]
        if not lo <= ev["value"] <= hi:
            raise CaseError(_where(["events", i, "value"]), f"value {ev['value']:g} is outside the accepted range "
                                                             f"{lo:g} to {hi:g} for {ev['kind']} ({name})")
        if ev["minute"] >= duration:
            raise CaseError(_where(["events", i, "minute"]), f"minute {ev['minute']:g} is outside the run "
                                                              f"(0 to below {duration:g} min)")
    for i, cp in enumerate(doc.get("checkpoints", [])):
        if cp["minute"] > duration:
            raise CaseError(_where(["checkpoints", i, "minute"]), f"minute {cp['minute']:g} is after the run ends "
                                                                   f"({duration:g} min)")
    for i, ex in enumerate(doc.get("expected_actions", [])):
        if ex["what"] != "draw" and ("setting" not in ex or "value" not in ex):
            raise CaseError(_where(["expected_actions", i]), f"'{ex['what']}' needs a setting and a value")
        if ex["by_minute"] > duration:
            raise CaseError(_where(["expected_actions", i, "by_minute"]), f"minute {ex['by_minute']:g} is after the "
                                                                          f"run ends ({duration:g} min)")
    return doc


def resolve_case(script: dict, folder: Path | None) -> dict:
    ref = script["case"]
    if isinstance(ref, dict):
        try:
            return validate(ref)
        except CaseError as exc:
            raise CaseError(f"script.case.{exc.field}", str(exc).split(": ", 1)[1]) from None
    if ref.startswith("demo:"):
        name = ref[5:]
        if name not in DEMO_NAMES:
            raise CaseError("script.case", f"value {ref!r}: no such demo case; accepted: "
                                           + ", ".join(f"demo:{n}" for n in DEMO_NAMES))
        return load_demo(name)
    if folder is None:
        raise CaseError("script.case", f"value {ref!r}: a built-in script names a demo case or holds its case inline")
    path = Path(ref)
    # A script names files beside it or below it, never elsewhere on the disk.
    inside = folder.resolve()
    full = (inside / path).resolve()
    if path.is_absolute() or (full != inside and inside not in full.parents):
        raise CaseError("script.case", f"value {ref!r} is outside the script's folder: give a path relative to the "
                                       f"script, in its folder or below")
    try:
        return load(full)
    except CaseError as exc:
        raise CaseError(f"script.case ({ref}) {exc.field}", str(exc).split(": ", 1)[1]) from None


def followed_course(timeline: Timeline, duration: float):
    """The timeline's course to ``duration``; ArithmeticError (starting FOLLOW_FAILED) where it fails."""
    c = timeline.course(duration)
    if not bool(np.all(c.success)):
        raise ArithmeticError(f"{FOLLOW_FAILED}{c.message}")
    return c


def support_of(settings: dict) -> Support:
    """The engine's support settings from case-file settings on pressure support or CPAP."""
    return Support(fio2=float(settings["fio2"]), peep=float(settings["peep_cmh2o"]),
                   pressure_support=float(settings.get("pressure_support_cmh2o") or 0.0)
                   if settings["mode"] == "pressure-support" else 0.0,
                   cycle_off_fraction=float(settings.get("cycle_off_fraction") or CYCLE_OFF_DEFAULT),
                   apparatus_dead_space_ml=float(settings.get("apparatus_dead_space_ml") or 0.0))


class Run:
    """One run of a script: the clock is the caller's; everything else is here."""

    def __init__(self, script: dict, folder: Path | None = None, seed: int = 0):
        self.script, self.folder, self.seed = script, folder, seed
        self.case = resolve_case(script, folder)
        if script.get("start_settings"):
            self.case["settings"] = apply_sets(self.case, [f"{k}={v}" for k, v in script["start_settings"].items()],
                                               where="script.start_settings")
        _patient, _obs, fitted = fit_case(self.case)
        self.fit = fitted
        self.duration = float(script.get("duration_min", 60.0))
        self.speed = float(script.get("speed", 10.0))
        self.delay = float(script.get("draw_delay_min", 2.0))
        start = self.case["settings"]
        if "patient_response" in script and start["mode"] not in SPONTANEOUS_MODES:
            raise CaseError("script.patient_response", f"value {script['patient_response']!r} applies to a patient on "
                                                       f"pressure support or CPAP; this case is in {start['mode']} mode")
        if start["mode"] in SPONTANEOUS_MODES:
            self.timeline = Timeline(fitted.model, support_of(start), seed=seed,
                                     effort=self._effort(fitted, script.get("patient_response", "drive_preserved")))
        else:
            self.timeline = Timeline(fitted.model, to_settings(start), seed=seed)
        # The learner's settings as the case file writes them, from each minute on (the timeline holds the
        # engine's form).
        self.learner = [(0.0, dict(start))]
        for ev in script["events"]:
            self.timeline.add_event(Event(float(ev["minute"]), ev["kind"], float(ev["value"]), ev.get("note", "")))
        self.action_log = []
        self._course = None
        self._last = None  # the newest event or action, for revert_last

    def _effort(self, fitted, response: str) -> Effort:
        """The patient's effort on support, from the newest gas taken on it (:func:`app.engine.spontaneous_now`:
        the Pmus that gives the measured VT at the support then, with the fitted mechanics); the alveolar
        ventilation then is the one a patient who keeps their drive defends."""
        now = spontaneous_now(self.case, fitted)
        series = float(np.asarray(fitted.model.mechanics.anatomic_dead_space_ml)) + \
            float(self.case["settings"].get("apparatus_dead_space_ml") or 0.0)
        va = now["rr_per_min"] * max(now["vt_ml"] - series, 0.0) / 1000.0
        return Effort(pmus=now["pmus_model_cmh2o"], rr=now["rr_per_min"], ti_neural=now["ti_neural_s"],
                      alveolar_ventilation=va, vt_ml=now["vt_ml"], response=response)

    @property
    def spontaneous(self) -> bool:
        return self.timeline.spontaneous

    def learner_at(self, minute: float) -> dict:
        """The learner's settings in force at ``minute``, as case-file settings."""
        out = self.learner[0][1]
        for t, s in self.learner:
            if t <= minute:
                out = s
        return out

    # -- changes --------------------------------------------------------------------------------------
    def inject(self, minute: float, kind: str, value: float, note: str = "instructor", check: bool = True) -> None:
        """An instructor's event at ``minute``. ``check``: on support, the course with it is worked out now and
        a patient who cannot be followed through it refuses it (the window checks on its worker instead and calls
        :meth:`revert_last` on a refusal)."""
        self._check_minute(minute)
        event = Event(float(minute), kind, float(value), note, source="instructor")
        self.timeline.add_event(event)
        self._last = ("event", event)
        self._course = None
        if check:
            self._check_or_revert()

    def _check_or_revert(self) -> None:
        """On support, every breath and the course are worked out now (a lower support can leave a patient who
        keeps their effort without enough ventilation to live on); a refusal undoes the change and says why."""
        if not self.spontaneous:
            return
        try:
            self.course()
        except (ValueError, ArithmeticError) as exc:
            self.revert_last()
            why = str(exc).removeprefix(FOLLOW_FAILED)
            raise CaseError(NOT_FOLLOWED, f"the patient on support cannot be followed after this change: {why}") \
                from None

    def revert_last(self) -> None:
        """Undo the newest event or learner action (a change the patient cannot be followed through)."""
        last, self._last = self._last, None
        if last is None:
            return
        if last[0] == "event":
            self.timeline.events.remove(last[1])
        else:
            _kind, action, entry, log = last
            self.timeline.actions.remove(action)
            self.learner.remove(entry)
            self.action_log.remove(log)
        self._course = None

    def act(self, minute: float, sets, where: str = "--set", check: bool = True) -> dict:
        """The learner changes settings at ``minute`` (KEY=VALUE list or a dict of case-file settings keys);
        ``where`` names the source in a refusal; ``check`` as for :meth:`inject`."""
        self._check_minute(minute)
        case_now = dict(self.case, settings=dict(self.learner_at(minute)))
        if isinstance(sets, dict):
            sets = [f"{k}={v}" for k, v in sets.items()]
        new = apply_sets(case_now, sets, where=where)
        if (new["mode"] in SPONTANEOUS_MODES) != self.spontaneous:
            accepted = "pressure-support or cpap" if self.spontaneous else "volume or pressure"
            why = ("the patient breathes on support in this walkthrough" if self.spontaneous else
                   "the patient is on controlled ventilation in this walkthrough (their own effort is not known)")
            option = re.fullmatch(r"--[a-z-]+", where) is not None  # as apply_sets names fields
            raise CaseError(f"{where} mode" if option else f"{where}.mode",
                            f"value {new['mode']!r} is not accepted: {why}; accepted: {accepted}")
        action = Action(float(minute), support_of(new) if self.spontaneous else to_settings(new), ", ".join(sets))
        try:
            self.timeline.add_action(action)
        except (ValueError, ArithmeticError) as exc:
            raise CaseError(where, str(exc)) from None
        entry = (float(minute), new)
        log = {"minute": float(minute), "settings": new, "changed": [set_words(x) for x in sets]}
        self.learner.append(entry)
        self.learner.sort(key=lambda x: x[0])
        self.action_log.append(log)
        self._last = ("action", action, entry, log)
        self._course = None
        if check:
            self._check_or_revert()
        return new

    def draw(self, minute: float) -> dict:
        self._check_minute(minute)
        d = self.timeline.draw(minute, self.course(), self.delay)
        return {"minute": d.minute, "ready_at": d.ready_at, **{k: round(v, 4) for k, v in d.values.items()}}

    def _check_minute(self, minute):
        if not (math.isfinite(minute) and 0 <= minute <= self.duration):
            raise CaseError("minute", f"value {minute} is outside the run 0 to {self.duration:g} min")

    # -- reading --------------------------------------------------------------------------------------
    def course(self):
        if self._course is None:
            self._course = followed_course(self.timeline, self.duration)
        return self._course

    def values_at(self, minute: float) -> dict:
        c = self.course()
        return {q: float(np.interp(minute, c.minutes, getattr(c, q))) for q in ("pao2", "paco2", "ph", "sao2", "petco2")}

    def due(self, start: float, end: float) -> dict:
        """Events, checkpoints and draw results that fall in (start, end]: what the clock reveals."""
        return {"events": [e for e in self.timeline.events if start < e.minute <= end],
                "checkpoints": [c for c in self.script.get("checkpoints", []) if start < c["minute"] <= end],
                "results": [d for d in self.timeline.draws if start < d.ready_at <= end]}

    def score(self, until: float | None = None) -> list:
        """Each expected action met or not; with ``until`` (a run stopped early), one due after it is
        neither (``met`` None): the learner still had time for it."""
        out = []
        for ex in self.script.get("expected_actions", []):
            t = float(ex["by_minute"])
            if until is not None and t > until + 1e-9:
                goal = ("a blood gas drawn" if ex["what"] == "draw" else
                        setting_words(ex["setting"], ex["value"], "at least" if ex["what"] == "setting_at_least"
                                      else "at most"))
                out.append({"expected": f"{goal} by minute {t:g} (not yet due: the run stopped at minute "
                                        f"{until:g})", "met": None, "why": ex.get("why", "")})
                continue
            if ex["what"] == "draw":
                first = min((d.minute for d in self.timeline.draws), default=None)
                met = first is not None and first <= t
                when = "none drawn" if first is None else f"first drawn at minute {first:g}"
                text = f"a blood gas drawn by minute {t:g} ({when})"
            else:
                value = self.learner_at(t).get(ex["setting"])
                met = value is not None and (value >= ex["value"] if ex["what"] == "setting_at_least" else value <= ex["value"])
                word = "at least" if ex["what"] == "setting_at_least" else "at most"
                goal = setting_words(ex["setting"], ex["value"], word)
                was = "not set" if value is None else setting_words(ex["setting"], value)
                text = f"{goal} by minute {t:g} (at minute {t:g}: {was})"
            out.append({"expected": text, "met": bool(met), "why": ex.get("why", "")})
        return out

    def breathing_segments(self, until: float | None = None) -> list:
        """On support, the patient's breathing between changes up to ``until``: the support, VT, rate,
        RSBI and Pmus of the breath, the lowest pH and SaO2 of the course over the stretch, and the
        breathing-trial stop rules broken there (:data:`physiology.planning.support.STOP_RULES`). Empty
        on controlled ventilation."""
        if not self.spontaneous:
            return []
        until = self.duration if until is None else float(until)
        c = self.course()
        goal = case_goals(self.case).spo2
        spo2_goal = 0.88 if goal is None else float(goal[0])
        starts = sorted({0.0, *self.timeline.change_minutes(until)})
        out = []
        for i, t0 in enumerate(starts):
            t1 = starts[i + 1] if i + 1 < len(starts) else until
            b = self.timeline.breathing_at(t0)
            br = b["breath"]
            inside = (c.minutes >= t0 - 1e-9) & (c.minutes <= t1 + 1e-9)
            numbers = {"rr_per_min": round(float(b["rr"]), 1), "vt_ml": round(float(br.vt_ml)),
                       "rsbi": round(float(br.rsbi)), "pmus_cmh2o": round(float(br.pmus), 1),
                       "ppeak_cmh2o": round(float(br.ppeak), 1),
                       "intrinsic_peep_cmh2o": round(float(br.intrinsic_peep), 1),
                       "ph": round(float(np.min(c.ph[inside])), 3), "sao2": round(float(np.min(c.sao2[inside])), 3),
                       "attainable": b["attainable"]}
            numbers["breaks"] = breaks(numbers, spo2_goal)
            if not b["attainable"]:
                numbers["breaks"].append("the alveolar ventilation of the start cannot be kept")
            out.append({"from_minute": t0, "to_minute": t1, "settings": settings_text(self.learner_at(t0)),
                        **numbers})
        return out

    def debrief(self, until: float | None = None) -> dict:
        """The record of the run up to ``until`` (the whole run by default): the headless JSON."""
        until = self.duration if until is None else float(until)
        c = self.course()
        keep = c.minutes <= until + 1e-9

        def r(a, d):
            return [round(float(x), d) for x in np.asarray(a)[keep]]

        score = self.score(until)
        events = [e for e in self.timeline.events if e.minute <= until]
        draws = [d for d in self.timeline.draws if d.minute <= until]
        timeline = [{"minute": e.minute, "what": f"event ({e.source})",
                     "detail": f"{event_words(e.kind, e.value)}: {e.note}".rstrip(": ")} for e in events]
        timeline += [{"minute": float(c["minute"]), "what": "prompt", "detail": c["prompt"]}
                     for c in self.script.get("checkpoints", []) if c["minute"] <= until]
        timeline += [{"minute": a["minute"], "what": "learner", "detail": ", ".join(a["changed"])}
                     for a in self.action_log if a["minute"] <= until]
        timeline += [{"minute": d.minute, "what": "blood gas drawn", "detail": f"result at {d.ready_at:g} min"}
                     for d in draws]
        timeline += [{"minute": d.ready_at, "what": "blood gas result",
                      "detail": f"drawn at {d.minute:g} min: PaO2 {d.values['pao2']:.0f} mmHg, PaCO2 "
                                f"{d.values['paco2']:.1f} mmHg, pH {d.values['ph']:.2f}, SaO2 "
                                f"{100 * d.values['sao2']:.0f} %"} for d in draws if d.ready_at <= until]
        order = {"event (script)": 0, "event (instructor)": 0, "prompt": 1, "blood gas result": 2,
                 "blood gas drawn": 3, "learner": 4}
        timeline.sort(key=lambda t: (t["minute"], order.get(t["what"], 5)))
        return {"title": self.script["title"], "until_min": until, "summary": self.script.get("summary", ""),
                "timeline": timeline,
                "events": [{"minute": e.minute, "kind": e.kind, "value": e.value, "note": e.note, "source": e.source}
                           for e in events],
                "actions": [a for a in self.action_log if a["minute"] <= until],
                "draws": [{"minute": d.minute, "ready_at": d.ready_at, **{k: round(v, 4) for k, v in d.values.items()}}
                          for d in draws],
                "course": {"minutes": r(c.minutes, 3), "pao2_mmhg": r(c.pao2, 2), "paco2_mmhg": r(c.paco2, 2),
                           "ph": r(c.ph, 4), "sao2": r(c.sao2, 4)},
                "score": {"items": score, "met": sum(s["met"] is True for s in score),
                          "of": sum(s["met"] is not None for s in score),
                          "not_yet_due": sum(s["met"] is None for s in score)},
                "breathing": self.breathing_segments(until),
                "caution": CAUTION}


def score_text(debrief: dict) -> str:
    """The debrief's score in words: 'met of due', and how many expected actions were not yet due."""
    score = debrief["score"]
    later = score["not_yet_due"]
    return f"{score['met']} of {score['of']}" + (f" ({later} not yet due)" if later else "")


def breathing_lines(debrief: dict) -> list:
    """The patient's breathing on support, stretch by stretch, in words (empty on controlled ventilation)."""
    out = []
    for b in debrief.get("breathing", []):
        support = b["settings"].split(", FiO2")[0]
        verdict = ("breaks: " + "; ".join(b["breaks"])) if b["breaks"] else "no breathing-trial stop rule broken"
        out.append(f"minutes {b['from_minute']:g}-{b['to_minute']:g}, {support}: rate {b['rr_per_min']:.0f}/min, "
                   f"VT {b['vt_ml']:.0f} mL, RSBI {b['rsbi']:.0f}, Pmus {b['pmus_cmh2o']:.1f} cmH2O, lowest pH "
                   f"{b['ph']:.2f} — {verdict}")
    return out


def apply_actions_file(run: Run, text: str) -> None:
    """Learner actions for a headless run: a JSON list of {minute, set: {KEY: VALUE}} | {minute, draw: true}
    | {minute, event: {kind, value, note}}. A refusal names the action by its index."""
    items = parse_json(text, "--actions")
    if not isinstance(items, list):
        raise CaseError("--actions", "the actions file is a JSON list")

    def named(prefix, fn, *args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except CaseError as exc:
            # A change the patient cannot be followed through is named by the action itself.
            field = (prefix if exc.field == NOT_FOLLOWED else exc.field if exc.field.startswith(prefix)
                     else f"{prefix}.{exc.field}")
            raise CaseError(field, str(exc).split(": ", 1)[1]) from None
        except ValueError as exc:
            raise CaseError(prefix, str(exc)) from None

    # Events and settings first, then draws, so that every draw sees the whole schedule.
    for i, it in enumerate(items):
        where = f"--actions[{i}]"
        if not isinstance(it, dict) or not isinstance(it.get("minute"), (int, float)) or isinstance(it.get("minute"), bool):
            raise CaseError(where, "each action needs a numeric minute")
        keys = set(it) - {"minute"}
        if keys == {"set"} and isinstance(it["set"], dict):
            named(where, run.act, float(it["minute"]), it["set"], where=f"{where}.set")
        elif keys == {"event"} and isinstance(it["event"], dict):
            ev = it["event"]
            if ev.get("kind") not in EVENT_KINDS or not isinstance(ev.get("value"), (int, float)):
                raise CaseError(f"{where}.event", f"needs a kind ({', '.join(sorted(EVENT_KINDS))}) and a numeric value")
            named(f"{where}.event", run.inject, float(it["minute"]), ev["kind"], float(ev["value"]),
                  str(ev.get("note", "instructor")))
        elif keys != {"draw"} or it["draw"] is not True:
            raise CaseError(where, "expected one of: set (an object), draw (true), event (an object)")
    for i, it in enumerate(items):
        if "draw" in it:
            named(f"--actions[{i}]", run.draw, float(it["minute"]))
