"""Options: settings that meet stated goals within lung-protective limits, with their probability.

Method
------
1. **Mechanics screen.** Every combination of PEEP (1 cmH2O steps), tidal volume (0.5 mL/kg PBW
   steps; inspiratory pressure in 1 cmH2O steps in pressure control) and rate (1/min steps) is
   breathed through the fitted mechanics in one batch; a combination that breaks a limit (Pplat,
   driving pressure, VT per kg PBW, rate, intrinsic PEEP, mechanical power) fails at every FiO2, so
   each candidate (combination x FiO2 in 0.05 steps) is screened without its gas exchange.
2. **Gas exchange at the fitted patient** for every candidate that passed, in one batched call, after
   a pass at the current FiO2 that drops breaths whose pH or PaCO2 misses its goal by more than a
   tolerance (CO2 exchange barely depends on FiO2).
3. **Probability** of meeting every goal and limit, from the fit's parameter draws, for the best
   ``n_best`` candidates (those meeting the goals at the fitted patient first, then the closest).
4. **Ranking**: probability >= ``required_probability`` first; then lowest FiO2, lowest driving
   pressure, lowest mechanical power, fewest settings changed from now.

When no candidate reaches the required probability, the result says so, lists the closest, and
names the binding constraint (the goal or limit the best candidates miss most often).

The oxygenation goal follows the ARDS Network protocol: PaO2 55-80 mmHg *or* SpO2 88-95 % (the
model's SaO2 stands for SpO2).
"""

from __future__ import annotations

from dataclasses import dataclass, fields, replace

import numpy as np

from ..forecast import PatientModel, Prediction, predict
from ..mechanics.ventilator import Settings, breathe
from ..protocols import LIMITS

__all__ = ["Goals", "Candidate", "SearchResult", "search", "evaluate", "margins", "CONSTRAINT_NAMES"]


@dataclass(frozen=True)
class Goals:
    """Goals (ranges) and limits (ceilings) of a search [units in the names].

    Oxygenation is met when SaO2 is within ``spo2`` or PaO2 within ``pao2`` (ARDS Network 2000).
    ``None`` switches a goal off.
    """

    spo2: tuple | None = (LIMITS["spo2"].low, LIMITS["spo2"].high)
    pao2_mmhg: tuple | None = (LIMITS["pao2"].low, LIMITS["pao2"].high)
    paco2_mmhg: tuple | None = None
    ph: tuple | None = (LIMITS["ph"].low, LIMITS["ph"].high)
    pplat_max_cmh2o: float = LIMITS["pplat"].high
    driving_pressure_max_cmh2o: float = LIMITS["driving_pressure"].high
    vt_ml_per_kg_pbw: tuple = (LIMITS["vt_per_kg"].low, LIMITS["vt_per_kg"].high)
    rr_max_per_min: float = LIMITS["rr"].high
    intrinsic_peep_max_cmh2o: float = LIMITS["intrinsic_peep"].high
    mechanical_power_max_j_min: float | None = None
    fio2_max: float = 1.0

    @classmethod
    def from_case(cls, goals: dict | None) -> "Goals":
        """Goals from a case file's ``goals`` object (missing keys take the published defaults)."""
        goals = dict(goals or {})
        known = {f.name for f in fields(cls)}
        unknown = set(goals) - known
        if unknown:
            raise ValueError(f"goals: unknown key(s) {sorted(unknown)}; accepted: {sorted(known)}")
        return cls(**{k: (tuple(v) if isinstance(v, list) else v) for k, v in goals.items()})

    def as_dict(self) -> dict:
        return {f.name: (list(v) if isinstance(v, tuple) else v) for f in fields(self)
                for v in [getattr(self, f.name)]}


#: Every constraint checked, in the order they are reported, with the name used on screen.
CONSTRAINT_NAMES = {
    "oxygenation": "oxygenation goal (SpO2 or PaO2)", "paco2": "PaCO2 goal", "ph": "pH goal",
    "pplat": "Pplat limit", "driving_pressure": "driving-pressure limit", "vt_per_kg": "VT per kg PBW limits",
    "rr": "rate limit", "intrinsic_peep": "intrinsic-PEEP limit", "mechanical_power": "mechanical-power limit",
    "fio2": "FiO2 ceiling", "steady_state": "a steady state (the model finds none)",
}


def _within(x, rng):
    lo, hi = rng
    return (x >= lo) & (x <= hi)


def mechanics_checks(b, rr, vt_per_kg, goals: Goals) -> dict:
    """Limit checks that depend on the breath only (boolean arrays)."""
    with np.errstate(invalid="ignore"):
        out = {"pplat": b.pplat <= goals.pplat_max_cmh2o,
               "driving_pressure": b.driving_pressure <= goals.driving_pressure_max_cmh2o,
               "vt_per_kg": _within(vt_per_kg, goals.vt_ml_per_kg_pbw),
               "rr": rr <= goals.rr_max_per_min,
               "intrinsic_peep": b.intrinsic_peep <= goals.intrinsic_peep_max_cmh2o}
        out["mechanical_power"] = (b.mechanical_power <= goals.mechanical_power_max_j_min
                                   if goals.mechanical_power_max_j_min is not None else np.ones_like(out["rr"]))
    return out


def evaluate(pred: Prediction, goals: Goals) -> dict:
    """Every constraint of ``goals`` for a batch of forecasts: {name: bool array}, 'all' included."""
    g, b = pred.gas, pred.breathing
    ok = np.asarray(pred.success, dtype=bool)
    settings = pred.settings
    checks = mechanics_checks(b, np.asarray(settings.rr, dtype=float) * np.ones_like(b.pplat),
                              np.asarray(pred.vt_per_kg_pbw, dtype=float), goals)
    with np.errstate(invalid="ignore"):
        oxy = np.zeros_like(ok)
        if goals.spo2 is not None:
            oxy |= _within(g.sao2, goals.spo2)
        if goals.pao2_mmhg is not None:
            oxy |= _within(g.pao2, goals.pao2_mmhg)
        if goals.spo2 is None and goals.pao2_mmhg is None:
            oxy = np.ones_like(ok)
        checks["oxygenation"] = oxy
        checks["paco2"] = _within(g.paco2, goals.paco2_mmhg) if goals.paco2_mmhg is not None else np.ones_like(ok)
        checks["ph"] = _within(g.ph, goals.ph) if goals.ph is not None else np.ones_like(ok)
        checks["fio2"] = np.asarray(settings.fio2, dtype=float) <= goals.fio2_max + 1e-9
    checks = {k: np.asarray(v, dtype=bool) & ok for k, v in checks.items()}
    checks["steady_state"] = ok
    checks["all"] = np.logical_and.reduce([v for v in checks.values()])
    return checks


#: Usual spread of each goal's quantity, to put distances to different goals on one scale (our choice,
#: about one measurement-plus-physiological SD of each; from memory, not a published value).
GOAL_SCALES = {"spo2": 0.02, "pao2_mmhg": 8.0, "paco2_mmhg": 4.0, "ph": 0.03}


def _goal_distances(pred: Prediction, goals: Goals) -> list:
    """Signed distance inside each goal (negative outside), scaled by its usual spread; oxygenation is
    met by SpO2 or PaO2, so it takes the better of the two."""
    g = pred.gas

    def inside(x, rng, key):
        lo, hi = rng
        return np.minimum(x - lo, hi - x) / GOAL_SCALES[key]

    terms = []
    with np.errstate(invalid="ignore"):
        oxy = [inside(g.sao2, goals.spo2, "spo2")] if goals.spo2 is not None else []
        oxy += [inside(g.pao2, goals.pao2_mmhg, "pao2_mmhg")] if goals.pao2_mmhg is not None else []
        if oxy:
            terms.append(np.maximum.reduce(oxy))
        if goals.paco2_mmhg is not None:
            terms.append(inside(g.paco2, goals.paco2_mmhg, "paco2_mmhg"))
        if goals.ph is not None:
            terms.append(inside(g.ph, goals.ph, "ph"))
    return terms


def _margin(pred: Prediction, goals: Goals) -> np.ndarray:
    """How far inside the goals a forecast is: the smallest scaled distance to a goal's edge."""
    terms = _goal_distances(pred, goals)
    m = np.minimum.reduce(terms) if terms else np.full(np.shape(pred.gas.pao2), 10.0)
    return np.where(np.asarray(pred.success), np.nan_to_num(m, nan=-np.inf), -np.inf)


def _violation(pred: Prediction, goals: Goals) -> np.ndarray:
    """How far a forecast is from meeting the goals (0 when met): the scaled distances outside, summed."""
    terms = _goal_distances(pred, goals)
    v = np.sum([np.maximum(-t, 0.0) for t in terms], axis=0) if terms else np.zeros(np.shape(pred.gas.pao2))
    return np.where(np.asarray(pred.success), np.nan_to_num(v, nan=np.inf), np.inf)


#: Tolerances of the CO2 pre-screen at the current FiO2 (pH units, mmHg): our choice, several times the
#: Haldane shift of PaCO2 across the FiO2 grid, so that no breath that could meet the goals is dropped.
CO2_TOLERANCE_PH = 0.03
CO2_TOLERANCE_MMHG = 3.0

#: Cost of a candidate among those that meet the goals: one point per 0.05 of FiO2, per 2 cmH2O of
#: driving pressure, per 3 J/min of mechanical power, per setting changed, and per 2 cmH2O of PEEP
#: moved. A weighted sum, not a strict order: a strict FiO2-first order buys the last 0.05 of FiO2
#: with a PEEP of 16 in a lung that needs 6 (seen on the postop-wean demo).
COST_WEIGHTS = {"fio2": 1 / 0.05, "driving_pressure": 1 / 2.0, "mechanical_power": 1 / 3.0, "changes": 1.0,
                "peep_moved": 1 / 2.0}


def margins(pred: Prediction, goals: Goals) -> dict:
    """Distance of a (single) forecast to the edge of each goal and limit, in the goal's own unit;
    negative when outside. Oxygenation reports the better of the SpO2 and PaO2 margins."""
    g, b = pred.gas, pred.breathing

    def inside(x, rng):
        return float(min(float(x) - rng[0], rng[1] - float(x)))

    out = {}
    oxy = []
    if goals.spo2 is not None:
        out["spo2"] = inside(g.sao2, goals.spo2)
        oxy.append(out["spo2"] / 0.02)
    if goals.pao2_mmhg is not None:
        out["pao2_mmhg"] = inside(g.pao2, goals.pao2_mmhg)
        oxy.append(out["pao2_mmhg"] / 8.0)
    if goals.paco2_mmhg is not None:
        out["paco2_mmhg"] = inside(g.paco2, goals.paco2_mmhg)
    if goals.ph is not None:
        out["ph"] = inside(g.ph, goals.ph)
    out["pplat_cmh2o"] = goals.pplat_max_cmh2o - float(b.pplat)
    out["driving_pressure_cmh2o"] = goals.driving_pressure_max_cmh2o - float(b.driving_pressure)
    out["intrinsic_peep_cmh2o"] = goals.intrinsic_peep_max_cmh2o - float(b.intrinsic_peep)
    if goals.mechanical_power_max_j_min is not None:
        out["mechanical_power_j_min"] = goals.mechanical_power_max_j_min - float(b.mechanical_power)
    return out


@dataclass(frozen=True)
class Candidate:
    """One proposed setting: the Settings, the forecast at the fitted patient (index into ``screen``),
    the probability of meeting every goal and limit over the draws, and what fails most often."""

    settings: Settings
    probability: float
    failures: dict
    map_meets: bool
    changes: tuple


@dataclass(frozen=True)
class SearchResult:
    """success, message; options (best first, at most ``top``); met (some option reaches the required
    probability); binding_constraint (name or None); screened (candidates screened), evaluated
    (candidates whose gas exchange was computed), ranked (candidates given a probability);
    best_prediction : Prediction (batch) of the options at the fitted patient."""

    success: bool
    message: str
    options: tuple
    met: bool
    binding_constraint: str | None
    screened: int
    evaluated: int
    ranked: int
    goals: Goals
    best_prediction: Prediction | None


def _tile_model(model: PatientModel, n: int) -> PatientModel:
    """Repeat a patient model (scalars or draws of shape (B,)) ``n`` times: shape (n * B,)."""
    def rep(v):
        return np.tile(np.atleast_1d(np.asarray(v, dtype=float)), n) if np.ndim(v) else v

    mech = replace(model.mechanics, **{f.name: rep(getattr(model.mechanics, f.name)) for f in fields(model.mechanics)})
    return replace(model, **{f.name: rep(getattr(model, f.name)) for f in fields(model) if f.name != "mechanics"},
                   mechanics=mech)


def _take(settings: Settings, idx) -> Settings:
    return replace(settings, **{f: (None if getattr(settings, f) is None else np.asarray(getattr(settings, f))[idx])
                                for f in ("fio2", "peep", "vt_ml", "inspiratory_pressure", "rr", "ti",
                                          "apparatus_dead_space_ml", "pause")})


def _one(settings: Settings, i) -> Settings:
    s = _take(settings, i)
    return replace(s, **{f: (None if getattr(s, f) is None else float(getattr(s, f)))
                         for f in ("fio2", "peep", "vt_ml", "inspiratory_pressure", "rr", "ti",
                                   "apparatus_dead_space_ml", "pause")})


def changes_from(now: Settings, new: Settings) -> tuple:
    """The settings a candidate changes, in words with units."""
    out = []
    for name, label, unit, fmt in (("fio2", "FiO2", "", "{:.2f}"), ("peep", "PEEP", " cmH2O", "{:g}"),
                                   ("vt_ml", "VT", " mL", "{:g}"), ("inspiratory_pressure", "Pinsp", " cmH2O", "{:g}"),
                                   ("rr", "RR", "/min", "{:g}"), ("ti", "Ti", " s", "{:g}")):
        a, b = getattr(now, name), getattr(new, name)
        if a is None or b is None:
            continue
        if abs(float(a) - float(b)) > 1e-9:
            out.append(f"{label} {fmt.format(float(a))} -> {fmt.format(float(b))}{unit}")
    return tuple(out)


def candidate_grid(now: Settings, pbw_kg: float, goals: Goals, peep_range=(5, 20), rr_range=(8, None)):
    """The grid of breaths (PEEP x size x rate) and the FiO2 levels, as arrays."""
    peeps = np.arange(peep_range[0], peep_range[1] + 0.5, 1.0)
    rr_hi = goals.rr_max_per_min if rr_range[1] is None else rr_range[1]
    rrs = np.arange(rr_range[0], rr_hi + 0.5, 1.0)
    if now.mode == "volume":
        lo, hi = goals.vt_ml_per_kg_pbw
        sizes = np.unique(np.round(np.arange(lo, hi + 1e-9, 0.5) * pbw_kg / 10.0) * 10.0)
    else:
        sizes = np.arange(5.0, 31.0, 1.0)
    fio2s = np.round(np.concatenate([[0.21], np.arange(0.25, goals.fio2_max + 1e-9, 0.05)]), 2)
    P, S, R = (a.ravel() for a in np.meshgrid(peeps, sizes, rrs, indexing="ij"))
    ti = float(now.ti)
    keep = ti < 0.8 * 60.0 / R  # leave at least a fifth of the breath to breathe out
    return P[keep], S[keep], R[keep], fio2s


#: The shortest inspiratory time the search proposes [s] (common practice for adults).
TI_MIN_S = 0.5


def _breath_checks(model, now: Settings, P, S, R, T, goals: Goals, pbw_kg: float):
    """The limit checks of each breath (PEEP P, size S, rate R, inspiratory time T) that depend on the
    breath only, whether it passes them all, and its intrinsic PEEP [cmH2O]."""
    n = P.size
    size = {"vt_ml": S} if now.mode == "volume" else {"inspiratory_pressure": S}
    breaths = Settings(mode=now.mode, fio2=np.full(n, 0.5), peep=P, rr=R, ti=T,
                       apparatus_dead_space_ml=np.full(n, float(now.apparatus_dead_space_ml or 0.0)),
                       pause=np.zeros(n), **size)
    b = breathe(breaths, model.mechanics, pbw_kg=pbw_kg)
    mech = mechanics_checks(b, R, b.vt_ml / pbw_kg, goals)
    return mech, np.logical_and.reduce(list(mech.values())) & np.asarray(b.success, dtype=bool), b.intrinsic_peep


def search(model: PatientModel, draws: PatientModel, now: Settings, goals: Goals, pbw_kg: float,
           top: int = 5, n_best: int = 50, required_probability: float = 0.9, progress=None) -> SearchResult:
    """Settings that meet ``goals`` (see module notes). ``progress(fraction)`` is called between stages
    and may raise to cancel."""
    if not 0.5 <= required_probability < 1.0:
        raise ValueError(f"required_probability = {required_probability} is outside the accepted range 0.5 to <1")
    P, S, R, fio2s = candidate_grid(now, pbw_kg, goals)
    T = np.full(P.size, float(now.ti))
    apparatus = float(now.apparatus_dead_space_ml or 0.0)
    mech, mech_ok, peepi = _breath_checks(model, now, P, S, R, T, goals, pbw_kg)
    # Where intrinsic PEEP excludes breaths that pass every other limit, or comes within half of its
    # limit (gas trapping the parameter draws may carry over it), a shorter inspiratory time lengthens
    # expiration: those breaths are tried again at I:E 1:2, 1:3 and 1:4 (Ti of at least 0.5 s and
    # shorter than now; common practice in obstructive disease).
    others_ok = np.logical_and.reduce([v for k, v in mech.items() if k != "intrinsic_peep"])
    with np.errstate(invalid="ignore"):
        near_limit = ~(np.asarray(peepi) < 0.5 * goals.intrinsic_peep_max_cmh2o)
    trapped = np.flatnonzero(near_limit & others_ok)
    if trapped.size:
        breath = 60.0 / R[trapped]
        ti_new = np.round(np.stack([breath / 3.0, breath / 4.0, breath / 5.0]) / 0.05) * 0.05
        keep = (ti_new >= TI_MIN_S) & (ti_new < float(now.ti) - 1e-9)
        j = np.broadcast_to(trapped, ti_new.shape)[keep]
        P, S, R, T = (np.concatenate([a, a[j]]) for a in (P, S, R, T))
        T[-j.size:] = ti_new[keep]
        mech, mech_ok, _peepi = _breath_checks(model, now, P, S, R, T, goals, pbw_kg)
    n_breaths = P.size
    size = {"vt_ml": S} if now.mode == "volume" else {"inspiratory_pressure": S}
    screened = int(n_breaths * fio2s.size)
    if progress:
        progress(0.2)
    if not np.any(mech_ok):
        # The binding limit: the one that excludes the most breaths that pass every other limit.
        worst = max(mech, key=lambda k: int(np.sum(~mech[k] & np.logical_and.reduce(
            [v for kk, v in mech.items() if kk != k]))))
        return SearchResult(False, f"no setting on the grid keeps within the limits; binding: {CONSTRAINT_NAMES[worst]}",
                            (), False, CONSTRAINT_NAMES[worst], screened, 0, 0, goals, None)
    idx = np.flatnonzero(mech_ok)
    # CO2 and pH barely depend on FiO2 (the Haldane effect moves PaCO2 by well under 1 mmHg per 0.1 of
    # FiO2): one pass at the current FiO2 drops the breaths that cannot meet the pH or PaCO2 goal at any
    # FiO2, with a tolerance, before the full FiO2 grid. If that leaves nothing, all are kept so that the
    # closest options can still be shown.
    if goals.ph is not None or goals.paco2_mmhg is not None:
        probe = Settings(mode=now.mode, fio2=np.full(idx.size, float(now.fio2)), peep=P[idx], rr=R[idx],
                         ti=T[idx], apparatus_dead_space_ml=np.full(idx.size, apparatus),
                         pause=np.zeros(idx.size), **{key: v[idx] for key, v in size.items()})
        g1 = predict(model, probe).gas
        with np.errstate(invalid="ignore"):
            near = np.ones(idx.size, dtype=bool)
            if goals.ph is not None:
                near &= (g1.ph >= goals.ph[0] - CO2_TOLERANCE_PH) & (g1.ph <= goals.ph[1] + CO2_TOLERANCE_PH)
            if goals.paco2_mmhg is not None:
                near &= ((g1.paco2 >= goals.paco2_mmhg[0] - CO2_TOLERANCE_MMHG)
                         & (g1.paco2 <= goals.paco2_mmhg[1] + CO2_TOLERANCE_MMHG))
        if np.any(near):
            idx = idx[near]
    k = idx.size
    F = np.repeat(fio2s[None, :], k, axis=0).ravel()
    rep = np.repeat(idx, fio2s.size)
    cand = Settings(mode=now.mode, fio2=F, peep=P[rep], rr=R[rep], ti=T[rep],
                    apparatus_dead_space_ml=np.full(F.size, apparatus), pause=np.zeros(F.size),
                    **{key: v[rep] for key, v in size.items()})
    pred = predict(model, cand)
    checks = evaluate(pred, goals)
    if progress:
        progress(0.6)
    violation = _violation(pred, goals)
    margin = _margin(pred, goals)
    n_changes = np.zeros(F.size)
    for name, arr in (("fio2", F), ("peep", P[rep]), ("rr", R[rep]), ("ti", T[rep]), (next(iter(size)), S[rep])):
        ref = getattr(now, name)
        n_changes += 0 if ref is None else (np.abs(arr - float(ref)) > 1e-9)
    w = COST_WEIGHTS
    cost = (w["fio2"] * F + w["driving_pressure"] * np.nan_to_num(pred.breathing.driving_pressure, nan=1e3)
            + w["mechanical_power"] * np.nan_to_num(pred.breathing.mechanical_power, nan=1e3)
            + w["changes"] * n_changes + w["peep_moved"] * np.abs(P[rep] - float(now.peep)))
    # Leading candidates: those that meet the goals at the fitted patient, the most robust first (the
    # largest margin inside the goals), then the cheapest of those; else the closest to the goals.
    feasible = np.flatnonzero(checks["all"])
    if feasible.size:
        robust = feasible[np.argsort(-margin[feasible], kind="stable")][:4 * n_best]
        order = robust[np.argsort(cost[robust], kind="stable")][:n_best]
    else:
        order = np.argsort(violation, kind="stable")
        order = order[np.isfinite(violation[order])][:n_best]
    if order.size == 0:
        return SearchResult(False, "no setting on the grid has a steady state in the fitted patient", (), False,
                            CONSTRAINT_NAMES["steady_state"], screened, int(F.size), 0, goals, None)
    best = _take(cand, order)
    nd = int(np.atleast_1d(draws.shunt_fixed).size)
    tiled = _take(best, np.repeat(np.arange(order.size), nd))
    pd = predict(_tile_model(draws, order.size), tiled)
    dchecks = {key: v.reshape(order.size, nd) for key, v in evaluate(pd, goals).items()}
    prob = dchecks["all"].mean(axis=1)
    if progress:
        progress(0.95)
    met_mask = prob >= required_probability
    rank = np.lexsort((cost[order], -prob, ~met_mask))  # enough probability first, then cheapest, then likeliest
    rank = np.where(met_mask[rank].any(), rank, np.lexsort((cost[order], -prob)))
    chosen = rank[:top]
    steady_draws = dchecks["steady_state"]
    options = []
    for j in chosen:
        s = _one(best, j)
        n_ok = max(int(steady_draws[j].sum()), 1)
        fails = {key: float(np.sum(steady_draws[j] & ~v[j]) / n_ok) for key, v in dchecks.items()
                 if key not in ("all", "steady_state") and np.any(steady_draws[j] & ~v[j])}
        if not steady_draws[j].all():
            fails["steady_state"] = float(1.0 - steady_draws[j].mean())
        options.append(Candidate(settings=s, probability=float(prob[j]), failures=fails,
                                 map_meets=bool(checks["all"][order[j]]), changes=changes_from(now, s)))
    met = bool(np.any(met_mask))
    binding = None
    if not met:
        # The constraint the best candidates miss most often over the draws.
        share = {key: float(np.mean(steady_draws[chosen] & ~v[chosen])) for key, v in dchecks.items()
                 if key not in ("all", "steady_state")}
        share["steady_state"] = float(1.0 - steady_draws[chosen].mean())
        binding = CONSTRAINT_NAMES[max(share, key=share.get)]
        message = (f"no setting meets every goal with {100 * required_probability:.0f} % probability; the closest are "
                   f"shown; binding: {binding}")
    else:
        message = f"{int(met_mask.sum())} of {order.size} leading candidates meet every goal with " \
                  f">= {100 * required_probability:.0f} % probability"
    return SearchResult(True, message, tuple(options), met, binding, screened, int(F.size), int(order.size), goals,
                        predict(model, _take(best, chosen)))
