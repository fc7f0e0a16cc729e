"""Walkthrough timelines: a patient that evolves, scripted events, learner actions and blood-gas draws.

The whole timeline (every event and every learner action so far) is one schedule of changes for
:func:`physiology.dynamics.course.simulate`, integrated from the starting steady state: a run
reads the course at its clock, so a run at any speed shows exactly the offline course (no clock
drift, no lost events). A new event or action recomputes the schedule (tens of milliseconds).

Events (each changes the patient from its minute on; amounts accumulate):
``shunt_up`` (amount, fraction of cardiac output: secretions, consolidation), ``lung_collapse`` (amount,
fraction of the lung that collapses and can be recruited again: atelectasis), ``compliance_down``
(factor on the aerated-lung compliance), ``resistance_up`` (factor on airway resistance, and blood flow
moved to low-V/Q units:
bronchospasm), ``metabolism_up`` (factor on VO2 and VCO2: fever), ``cardiac_output_down`` (factor:
bleeding), ``circuit_leak`` (fraction of the set VT lost — in pressure control, of the inspiratory
pressure), ``recruitment_manoeuvre`` (pressure held, cmH2O: lung opened up to it stays open above
its closing pressure).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from .dynamics.course import Change, Course, simulate
from .forecast import PatientModel
from .mechanics.ventilator import Settings

__all__ = ["EVENT_KINDS", "Event", "Action", "Draw", "Timeline", "ANALYSER_SD"]

#: Event kinds: parameter name, accepted range, what it means.
EVENT_KINDS = {
    "shunt_up": ("amount", (0.0, 0.5), "shunt up by this fraction of cardiac output (secretions, consolidation)"),
    "lung_collapse": ("amount", (0.0, 0.4), "this fraction of the lung collapses and stays recruitable (atelectasis)"),
    "compliance_down": ("factor", (0.2, 1.0), "aerated-lung compliance multiplied by this factor"),
    "resistance_up": ("factor", (1.0, 10.0), "airway resistance multiplied by this factor (bronchospasm)"),
    "metabolism_up": ("factor", (1.0, 2.0), "VO2 and VCO2 multiplied by this factor (fever)"),
    "cardiac_output_down": ("factor", (0.2, 1.0), "cardiac output multiplied by this factor (bleeding)"),
    "circuit_leak": ("fraction", (0.0, 0.8), "this fraction of the set VT (or inspiratory pressure) is lost"),
    "recruitment_manoeuvre": ("pressure", (25.0, 50.0), "lung opened up to this pressure [cmH2O]"),
}

#: Blood-gas analyser noise (one SD): PaO2 2 mmHg + 2 %, PaCO2 1 mmHg + 1 %, pH 0.005, SaO2 0.005
#: (from memory: typical analyser imprecision; smaller than the fit's measurement model, which also
#: holds within-patient variation).
ANALYSER_SD = {"pao2": (2.0, 0.02), "paco2": (1.0, 0.01), "ph": (0.005, 0.0), "sao2": (0.005, 0.0)}


@dataclass(frozen=True)
class Event:
    minute: float
    kind: str
    value: float
    note: str = ""
    source: str = "script"  # 'script' or 'instructor'


@dataclass(frozen=True)
class Action:
    minute: float
    settings: Settings
    label: str = ""


@dataclass(frozen=True)
class Draw:
    minute: float
    ready_at: float
    values: dict


@dataclass
class Timeline:
    """Events, learner actions and draws over a starting patient and settings; ``course(until)``."""

    patient: PatientModel
    settings: Settings
    events: list = field(default_factory=list)
    actions: list = field(default_factory=list)
    draws: list = field(default_factory=list)
    seed: int = 0

    def add_event(self, event: Event) -> None:
        if event.kind not in EVENT_KINDS:
            raise ValueError(f"event kind {event.kind!r} is not one of {sorted(EVENT_KINDS)}")
        name, (lo, hi), _what = EVENT_KINDS[event.kind]
        if not lo <= event.value <= hi or not np.isfinite(event.value):
            raise ValueError(f"event {event.kind} {name} = {event.value} is outside the accepted range {lo} to {hi}")
        if event.minute < 0:
            raise ValueError(f"event minute {event.minute} is outside the accepted range 0 or more")
        self.events.append(event)
        self.events.sort(key=lambda e: e.minute)

    def add_action(self, action: Action) -> None:
        if action.minute < 0:
            raise ValueError(f"action minute {action.minute} is outside the accepted range 0 or more")
        action.settings.validated(self.patient.pbw_kg)
        self.actions.append(action)
        self.actions.sort(key=lambda a: a.minute)

    def settings_at(self, minute: float) -> Settings:
        """The learner's settings in force at ``minute`` (before any leak)."""
        s = self.settings
        for a in self.actions:
            if a.minute <= minute:
                s = a.settings
        return s

    def schedule(self, until: float):
        """The changes (patient and delivered settings) up to ``until`` for :func:`simulate`."""
        times = sorted({e.minute for e in self.events if e.minute < until}
                       | {a.minute for a in self.actions if a.minute < until})
        changes = []
        p = self.patient
        leak = 0.0
        for t in times:
            for e in (e for e in self.events if e.minute == t):
                name, _rng, _w = EVENT_KINDS[e.kind]
                if e.kind == "shunt_up":
                    p = p.replace(shunt_fixed=float(np.clip(np.asarray(p.shunt_fixed) + e.value, 0.0, 0.8)))
                elif e.kind == "lung_collapse":
                    # More recruitable lung, and the pressure history that held it open is lost.
                    p = p.replace(recruitable=float(np.clip(np.asarray(p.mechanics.recruitable) + e.value, 0.0, 0.6)),
                                  pressure_history=0.0)
                elif e.kind == "compliance_down":
                    p = p.replace(c_max=float(np.asarray(p.mechanics.c_max) * e.value))
                elif e.kind == "resistance_up":
                    # Bronchospasm narrows airways unevenly: blood flow moves to poorly ventilated (low-V/Q)
                    # units with little true shunt (MIGET in acute severe asthma, Rodriguez-Roisin 1989; from
                    # memory). Ours: each doubling of resistance moves a tenth of the perfused lung's flow there.
                    low = float(np.asarray(p.low_vq_fraction))
                    p = p.replace(resistance=float(np.asarray(p.mechanics.resistance) * e.value),
                                  low_vq_fraction=float(np.clip(low + LOW_VQ_PER_DOUBLING * np.log2(e.value), 0.0, 0.5)))
                elif e.kind == "metabolism_up":
                    p = p.replace(vo2=float(np.asarray(p.vo2) * e.value), vco2=float(np.asarray(p.vco2) * e.value))
                elif e.kind == "cardiac_output_down":
                    p = p.replace(cardiac_output_ref=float(np.asarray(p.cardiac_output_ref) * e.value))
                elif e.kind == "circuit_leak":
                    leak = e.value
                elif e.kind == "recruitment_manoeuvre":
                    p = p.replace(pressure_history=float(e.value))
            delivered = _leaky(self.settings_at(t), leak)
            changes.append(Change(minute=float(t), settings=delivered, patient=_patient_fields(p)))
        return changes

    def state_at(self, minute: float):
        """(patient model, delivered settings) in force at ``minute``: every event and action up to it."""
        changes = self.schedule(float(minute) + 1e-9)
        if not changes:
            return self.patient, self.settings
        return self.patient.replace(**changes[-1].patient), changes[-1].settings

    def course(self, until: float, step_s: float = 15.0) -> Course:
        """The course from minute 0 to ``until`` with every event and action so far."""
        return simulate(self.patient, self.settings, self.schedule(until), minutes=float(until), step_s=step_s)

    def draw(self, minute: float, course: Course, delay_min: float = 2.0) -> Draw:
        """A blood gas drawn at ``minute``: the course's values there with analyser noise; the result is
        ready ``delay_min`` later."""
        if not 0 <= minute <= float(course.minutes[-1]):
            raise ValueError(f"draw minute {minute} is outside the course 0 to {float(course.minutes[-1]):g} min")
        rng = np.random.default_rng(self.seed + len(self.draws))
        values = {}
        for q, (a, r) in ANALYSER_SD.items():
            v = float(np.interp(minute, course.minutes, getattr(course, q)))
            values[q] = v + rng.normal(0.0, a + r * abs(v))
        values["sao2"] = float(np.clip(values["sao2"], 0.0, 1.0))
        d = Draw(minute=float(minute), ready_at=float(minute + delay_min), values=values)
        self.draws.append(d)
        return d


#: Share of the perfused lung's blood flow moved to the low-V/Q mode per doubling of airway resistance in
#: a ``resistance_up`` event (ours; see Timeline.schedule).
LOW_VQ_PER_DOUBLING = 0.10


def _leaky(s: Settings, leak: float) -> Settings:
    if leak <= 0:
        return s
    if s.mode == "volume":
        return replace(s, vt_ml=float(s.vt_ml) * (1.0 - leak))
    return replace(s, inspiratory_pressure=float(s.inspiratory_pressure) * (1.0 - leak))


_PATIENT_KEYS = ("shunt_fixed", "vo2", "vco2", "cardiac_output_ref", "low_vq_fraction")
_MECH_KEYS = ("c_max", "resistance", "pressure_history", "recruitable")


def _patient_fields(p: PatientModel) -> dict:
    """Absolute values of every field an event can change (a Change replaces them)."""
    out = {k: getattr(p, k) for k in _PATIENT_KEYS}
    out.update({k: getattr(p.mechanics, k) for k in _MECH_KEYS})
    return out
