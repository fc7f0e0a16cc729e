"""Walkthrough timelines: a patient that evolves, scripted events, learner actions and blood-gas draws.

The whole timeline (every event and every learner action so far) is one schedule of changes for
:func:`physiology.dynamics.course.simulate`, integrated from the starting steady state: a run
reads the course at its clock, so a run at any speed shows exactly the offline course (no clock
drift, no lost events). A new event or action recomputes the schedule (tens of milliseconds).

Events (each changes the patient from its minute on; amounts accumulate):
``shunt_up`` (amount, fraction of cardiac output: secretions, consolidation), ``lung_collapse`` (amount,
fraction of the lung that collapses and can be recruited again: atelectasis), ``compliance_down``
(factor on the aerated-lung compliance), ``compliance_up`` (factor: recovery, oedema clearing),
``resistance_up`` (factor on airway resistance, and blood flow moved to low-V/Q units: bronchospasm),
``resistance_down`` (factor: secretions cleared, bronchodilation; the low-V/Q flow moves back),
``metabolism_up`` (factor on VO2 and VCO2: fever), ``cardiac_output_down`` (factor: bleeding),
``circuit_leak`` (fraction of the set VT lost — in pressure control, of the inspiratory pressure),
``recruitment_manoeuvre`` (pressure held, cmH2O: lung opened up to it stays open above its closing
pressure).

A patient breathing on pressure support or CPAP makes every breath: the learner sets :class:`Support`
and the patient's :class:`Effort` answers it. At each change the breath follows from the support, the
effort and the lung's mechanics then (:func:`physiology.mechanics.spontaneous.supported_breath`, with
the chord compliance of the lung at that breath's VT), and the lung model is given the volume-controlled
breath of the same VT and rate (:func:`physiology.mechanics.spontaneous.volume_stand_in`). The patient
answers either by keeping the alveolar ventilation of the start (``drive_preserved``: the rate rises as
support falls or the lung stiffens, then the effort: rapid shallow breathing) or by keeping effort and
rate (``effort_unchanged``: the ventilation falls and PaCO2 rises) — the two bounds of a forecast on
support, one chosen for the scripted patient.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from .dynamics.course import Change, Course, simulate
from .forecast import PatientModel
from .mechanics.spontaneous import (CYCLE_OFF_DEFAULT, INPUT_LIMITS, supported_breath, ventilation_kept,
                                    volume_stand_in)
from .mechanics.ventilator import SETTING_LIMITS, VT_PER_KG_LIMITS, Settings, breathe
from ._checks import check_fio2, check_range

__all__ = ["EVENT_KINDS", "Event", "Action", "Draw", "Timeline", "ANALYSER_SD", "Support", "Effort", "RESPONSES"]

#: Event kinds: parameter name, accepted range, what it means.
EVENT_KINDS = {
    "shunt_up": ("amount", (0.0, 0.5), "shunt up by this fraction of cardiac output (secretions, consolidation)"),
    "lung_collapse": ("amount", (0.0, 0.4), "this fraction of the lung collapses and stays recruitable (atelectasis)"),
    "compliance_down": ("factor", (0.2, 1.0), "aerated-lung compliance multiplied by this factor"),
    "compliance_up": ("factor", (1.0, 3.0), "aerated-lung compliance multiplied by this factor (recovery)"),
    "resistance_up": ("factor", (1.0, 10.0), "airway resistance multiplied by this factor (bronchospasm)"),
    "resistance_down": ("factor", (0.1, 1.0), "airway resistance multiplied by this factor (secretions cleared)"),
    "metabolism_up": ("factor", (1.0, 2.0), "VO2 and VCO2 multiplied by this factor (fever)"),
    "cardiac_output_down": ("factor", (0.2, 1.0), "cardiac output multiplied by this factor (bleeding)"),
    "circuit_leak": ("fraction", (0.0, 0.8), "this fraction of the set VT (or inspiratory pressure) is lost"),
    "recruitment_manoeuvre": ("pressure", (25.0, 50.0), "lung opened up to this pressure [cmH2O]"),
}

#: Blood-gas analyser noise (one SD): PaO2 2 mmHg + 2 %, PaCO2 1 mmHg + 1 %, pH 0.005, SaO2 0.005
#: (from memory: typical analyser imprecision; smaller than the fit's measurement model, which also
#: holds within-patient variation).
ANALYSER_SD = {"pao2": (2.0, 0.02), "paco2": (1.0, 0.01), "ph": (0.005, 0.0), "sao2": (0.005, 0.0)}


#: How a patient on support answers a change (see the module doc).
RESPONSES = ("drive_preserved", "effort_unchanged")


@dataclass(frozen=True)
class Support:
    """Learner settings on pressure support (``pressure_support`` 0: CPAP) [cmH2O above PEEP]; the patient
    triggers every breath and the ventilator cycles at ``cycle_off_fraction`` of peak flow."""

    fio2: float
    peep: float
    pressure_support: float
    cycle_off_fraction: float = CYCLE_OFF_DEFAULT
    apparatus_dead_space_ml: float = 0.0

    def validated(self, pbw_kg=None) -> None:
        check_fio2(self.fio2)
        check_range("PEEP", self.peep, *SETTING_LIMITS["peep"])
        check_range("pressure support", self.pressure_support, *INPUT_LIMITS["pressure_support"])
        check_range("cycling criterion", self.cycle_off_fraction, *INPUT_LIMITS["cycle_off_fraction"])
        check_range("apparatus dead space", self.apparatus_dead_space_ml, *SETTING_LIMITS["apparatus_dead_space_ml"])


@dataclass(frozen=True)
class Effort:
    """The breathing of a patient on support: peak muscle pressure per breath ``pmus`` [cmH2O], own rate
    ``rr`` [1/min] and neural inspiratory time ``ti_neural`` [s] (at the start), the alveolar ventilation
    the patient defends under ``drive_preserved`` [L/min] at the start's CO2 production (it follows the
    CO2 production: the drive keeps PaCO2, as after ``metabolism_up``), the VT at the start [mL] (where
    the search for each breath begins) and the ``response`` (one of RESPONSES)."""

    pmus: float
    rr: float
    ti_neural: float
    alveolar_ventilation: float
    vt_ml: float
    response: str = "drive_preserved"

    def __post_init__(self):
        if self.response not in RESPONSES:
            raise ValueError(f"response = {self.response!r} is not one of {', '.join(RESPONSES)}")


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
    effort: Effort | None = None
    _breaths: dict = field(default_factory=dict, repr=False, compare=False)

    def __post_init__(self):
        if isinstance(self.settings, Support) and self.effort is None:
            raise ValueError("a patient on support needs their effort (Effort)")

    @property
    def spontaneous(self) -> bool:
        """True when the patient breathes on support (the learner sets :class:`Support`)."""
        return isinstance(self.settings, Support)

    def copy(self) -> "Timeline":
        """A copy with its own lists of events and actions (no draws), sharing the breaths worked out."""
        return Timeline(self.patient, self.settings, list(self.events), list(self.actions), [], self.seed,
                        self.effort, self._breaths)

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
        if isinstance(action.settings, Support) != self.spontaneous:
            raise ValueError("a patient breathing on support stays on support in a walkthrough" if self.spontaneous
                             else "a patient on controlled ventilation stays on it in a walkthrough (the effort of "
                                  "a patient on support is not known)")
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
        return [Change(minute=float(t), settings=self.delivered(self.settings_at(t), p, leak),
                       patient=_patient_fields(p)) for t, p, leak in self._states(until)]

    def _states(self, until: float):
        """(minute, patient, leak) at each event or action before ``until``."""
        times = sorted({e.minute for e in self.events if e.minute < until}
                       | {a.minute for a in self.actions if a.minute < until})
        states = []
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
                elif e.kind in ("compliance_down", "compliance_up"):
                    p = p.replace(c_max=float(np.asarray(p.mechanics.c_max) * e.value))
                elif e.kind in ("resistance_up", "resistance_down"):
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
            states.append((t, p, leak))
        return states

    def change_minutes(self, until: float) -> list:
        """The minutes of every event or action before ``until``, in order."""
        return [t for t, _p, _leak in self._states(until)]

    def _state(self, minute: float):
        """(patient, leak) in force at ``minute``."""
        states = self._states(float(minute) + 1e-9)
        return (states[-1][1], states[-1][2]) if states else (self.patient, 0.0)

    def state_at(self, minute: float):
        """(patient model, delivered settings) in force at ``minute``: every event and action up to it."""
        p, leak = self._state(minute)
        return p, self.delivered(self.settings_at(minute), p, leak)

    def delivered(self, learner, p: PatientModel, leak: float = 0.0) -> Settings:
        """The engine settings the lung model is given: the learner's (less any leak), or on support the
        volume-controlled stand-in of the patient's breath."""
        if isinstance(learner, Support):
            return self.breathing(_leaky(learner, leak), p)["settings"]
        return _leaky(learner, leak)

    def breathing_at(self, minute: float) -> dict | None:
        """On support, the patient's breath at ``minute`` (:meth:`breathing`); None on controlled ventilation."""
        if not self.spontaneous:
            return None
        p, leak = self._state(minute)
        return self.breathing(_leaky(self.settings_at(minute), leak), p)

    def breathing(self, support: Support, p: PatientModel) -> dict:
        """The patient's breath on ``support`` with the lung ``p``: {"breath": SupportedBreath, "rr",
        "attainable" (False when the defended ventilation is out of reach even at 40 cmH2O of effort),
        "compliance_ml" (the chord compliance of the lung at this VT), "settings": the stand-in}. The
        compliance and the breath are solved together (secant steps on VT); one that does not settle
        within 1 mL raises ArithmeticError, a VT below what the lung model follows raises ValueError."""
        key = (support, tuple(float(np.asarray(v)) for v in _patient_fields(p).values()))
        hit = self._breaths.get(key)
        if hit is not None:
            return hit
        e = self.effort
        mech = p.mechanics
        series = float(np.asarray(mech.anatomic_dead_space_ml)) + float(support.apparatus_dead_space_ml)
        resistance = float(np.asarray(mech.resistance))
        # A patient who keeps their drive keeps their PaCO2: the ventilation defended follows CO2 production.
        defended = e.alveolar_ventilation * float(np.asarray(p.vco2)) / float(np.asarray(self.patient.vco2))
        answers = {}
        lo, hi = SETTING_LIMITS["vt_ml"][:2]
        lo = max(lo, VT_PER_KG_LIMITS[0] * float(np.asarray(p.pbw_kg)))

        def chord(vt):
            """The lung's chord compliance at a breath of ``vt`` [mL/cmH2O], None beyond its capacity."""
            b = breathe(volume_stand_in(vt, e.rr, support.fio2, support.peep, support.apparatus_dead_space_ml), mech)
            return float(np.asarray(b.compliance)) if bool(np.all(b.success)) else None

        def excess(vt, compliance):
            """The breath's VT with the lung's chord compliance at ``vt``, less ``vt`` [mL]."""
            if e.response == "drive_preserved":
                answer = ventilation_kept(defended, support.pressure_support, support.peep, resistance,
                                          compliance, e.pmus, e.rr, e.ti_neural, series, support.cycle_off_fraction)
            else:
                answer = {"breath": supported_breath(support.pressure_support, support.peep, resistance, compliance,
                                                     e.pmus, e.rr, e.ti_neural, support.cycle_off_fraction),
                          "rr": float(e.rr), "attainable": True}
            answers[vt] = (answer, compliance)
            return float(answer["breath"].vt_ml) - vt

        # Start from the VT of the start, made smaller until the lung (perhaps stiffer now) can hold it.
        x0 = float(np.clip(e.vt_ml, lo, hi))
        c0 = chord(x0)
        while c0 is None and x0 > lo:
            x0 = max(0.7 * x0, lo)
            c0 = chord(x0)
        if c0 is None:
            raise ArithmeticError(f"the lung cannot hold even a {lo:.0f} mL breath on PEEP {support.peep:g} cmH2O")
        f0 = excess(x0, c0)
        # The compliance moves the breath only a little: a plain step, then secant steps (each one breath
        # search), halved back toward the last breath the lung held; after eight, damped steps.
        x1, f1 = float(np.clip(x0 + f0, lo, hi)), f0
        for i in range(40):
            if abs(f0) < 1.0 or (x0 == lo and f0 < 0):
                break
            c1 = chord(x1)
            if c1 is None:
                x1 = 0.5 * (x0 + x1)
                continue
            f1 = excess(x1, c1)
            if abs(f1) < 1.0 or (x1 == lo and f1 < 0):
                x0, f0 = x1, f1
                break
            x2 = x1 - f1 * (x1 - x0) / (f1 - f0) if i < 8 and f1 != f0 else x1 + 0.5 * f1
            x0, f0, x1 = x1, f1, float(np.clip(x2, lo, hi))
        else:
            raise ArithmeticError(f"the breath on pressure support {support.pressure_support:g} cmH2O did not settle "
                                  f"with the lung's compliance (VT {x1:.0f} mL, off by {f1:.0f} mL)")
        answer, compliance = answers[x0]
        new_vt, rr = float(answer["breath"].vt_ml), float(answer["rr"])
        if new_vt < lo:
            raise ValueError(f"pressure support = {support.pressure_support:g} cmH2O gives this patient a VT of "
                             f"{new_vt:.0f} mL, below the {lo:.0f} mL the lung model follows: more support is needed")
        out = {"breath": answer["breath"], "rr": rr, "attainable": bool(answer["attainable"]),
               "compliance_ml": compliance,
               "settings": volume_stand_in(new_vt, rr, support.fio2, support.peep, support.apparatus_dead_space_ml)}
        self._breaths[key] = out
        return out

    def course(self, until: float, step_s: float = 15.0) -> Course:
        """The course from minute 0 to ``until`` with every event and action so far."""
        return simulate(self.patient, self.delivered(self.settings, self.patient), self.schedule(until),
                        minutes=float(until), step_s=step_s)

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


def _leaky(s, leak: float):
    if leak <= 0:
        return s
    if isinstance(s, Support):
        return replace(s, pressure_support=float(s.pressure_support) * (1.0 - leak))
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
