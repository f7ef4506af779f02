"""One record -> one :class:`DesignResult`: assemble the nominal loop, analyse, judge.

Stages: parameters -> loop -> exact gain intervals (stability, gain margins) -> closed-loop
poles (Pade for dead time) -> pole-region intervals -> locus facts and branches -> verdicts.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.optimize import minimize_scalar

from .. import findings as fd
from ..lti import discrete, poly
from ..lti.digital import DigitalLoop, assemble_digital, continuous_record
from ..lti.digital import with_gains as digital_with_gains
from ..lti.loop import Loop, assemble, near_cancellations, with_gains
from ..lti.rational import pade
from ..metrics import METRICS, POLE_KEYS
from ..record import params
from ..record.errors import RecordInvalid
from ..record.model import Record, Requirement
from ..results import DesignResult
from ..verdict import Entry, headroom, headroom_array, judge, judge_stability
from . import digital as dg
from .branches import trace
from .curves import digital_frequency_block, envelope, frequency_block, scatter
from .delay import delay_gain_intervals
from .evaluate import FREQUENCY_KEYS, TIME_KEYS, Evaluation, evaluate
from .frequency import phase_crossovers
from .gain import GainIntervals, gain_margins, stable_gain_intervals
from .locus import locus_facts
from .poles import is_stable, pade_order
from .regions import metric_at_gains, region_intervals
from .sweep import make_plan

#: gains sampled over gain.range when the worst pole metric is sought (plus refinement)
RANGE_SAMPLES = 201
#: gains evaluated over gain.range for the worst frequency and time metrics
GAIN_SAMPLES = 21


def pairs(values: np.ndarray) -> list[list[float]]:
    """Complex values as [re, im] pairs, rightmost (slowest) first, then by imaginary part."""
    vals = sorted((complex(v) for v in np.ravel(values)), key=lambda c: (-c.real, c.imag))
    return [[float(c.real), float(c.imag)] for c in vals]


def interval_list(intervals: Any) -> list[list[float]]:
    return [[float(lo), float(hi)] for lo, hi in intervals]


@dataclass(frozen=True, slots=True)
class PoleModel:
    """The polynomials whose roots are the closed-loop poles: D_eff + K N_eff (1-D); for a
    sampled loop they are in z and ``period`` is set (poles map through s = ln(z)/T)."""

    n: np.ndarray
    d: np.ndarray
    order: int | None   # Pade order, None without dead time
    period: float | None = None


def pole_model(loop: Loop | DigitalLoop, record: Record) -> PoleModel:
    if isinstance(loop, DigitalLoop):
        return PoleModel(n=loop.nz[0], d=loop.dz[0], order=None, period=loop.period)
    n, d = loop.n[0], loop.d[0]
    if not loop.has_delay:
        return PoleModel(n=n, d=d, order=None)
    order = pade_order(loop, record.pade_order)
    pn, pd = pade(loop.delay[:1], order)
    return PoleModel(n=poly.mul(loop.n[:1], pn)[0], d=poly.mul(loop.d[:1], pd)[0], order=order)


def gain_analysis(loop: Loop | DigitalLoop, record: Record) -> GainIntervals:
    if isinstance(loop, DigitalLoop):
        return dg.gain_intervals(loop)[0]
    interest = [record.gain.nominal, *(record.gain.range or ())]
    if loop.has_delay:
        return delay_gain_intervals(loop.n, loop.d, loop.delay, np.array([interest]))[0]
    return stable_gain_intervals(loop.n, loop.d)[0]


def check_record(record: Record) -> DesignResult:
    """Analyse the nominal loop of a valid record. Raises RecordInvalid if it cannot be
    assembled (for example an improper block or a derived parameter that divides by 0).

    A record with ``sampling`` is analysed in the z-domain (:mod:`loopvet.analysis.digital`);
    its result then also carries ``continuous`` (the metrics of the continuous design) and
    ``sampling`` (period, z-plane poles, responses at the sample instants)."""
    values = params.values(record, 1)
    loop = _assemble(record, values, 1)
    k = record.gain.nominal
    found: list[fd.Finding] = []
    if isinstance(loop, Loop):
        found += [fd.near_cancellation(c.pole, c.zero, c.pole_block, c.zero_block, c.distance)
                  for c in near_cancellations(loop)]
    gi = gain_analysis(loop, record)
    stable = gi.interval_containing(k) is not None
    band = _band(record)
    try:
        dev = None
        if isinstance(loop, DigitalLoop):
            dev = dg.evaluate(loop, band=band, intervals=[gi])
            ev = dev.base
        else:
            ev = evaluate(loop, pade=record.pade_order, band=band, intervals=[gi])
    except ValueError:
        raise RecordInvalid([params.problem(
            record, "gain", "the loop is not well posed at the nominal gain: 1 + L(s) "
            "vanishes as s -> infinity, so D + K N loses its leading term; change the gain "
            "or make a block strictly proper")]) from None
    poles = ev.poles if dev is None else dev.z_poles
    if ev.pade_order and isinstance(loop, Loop):
        found.append(fd.pade_used(float(loop.delay[0]), ev.pade_order,
                                  chosen=record.pade_order is None))
        if bool(is_stable(poles)[0]) != stable:
            found.append(fd.pade_disagrees(ev.pade_order, stable))
    if gi.fixed_axis_pole:
        found.append(fd.fixed_axis_pole())
    if not stable:
        if dev is None:
            unstable_count = int(np.sum(poles[0].real >= -1e-10 * np.maximum(1, abs(poles[0]))))
        else:
            unstable_count = int(np.sum(np.abs(poles[0]) >= 1 - dg.UNIT_RTOL))
        found.append(fd.unstable(max(unstable_count, 1), ev.pade_order))
    if loop.has_delay and math.isfinite(gi.search_bound):
        found.append(fd.gain_search_bound(gi.search_bound))
    if gi.undecided:
        found.append(fd.crossing_search_undecided(gi.undecided))
    metrics: dict[str, Any] = {key: _value(ev.metrics[key][0]) for key in METRICS}
    if ev.reference is not None and bool(ev.reference.truncated[0]):
        found.append(fd.response_truncated())
    pc = _phase_crossovers(loop, gi)
    _compare_gain_margins(pc, metrics, stable, found)
    model = pole_model(loop, record)
    regions = {r.key: _region_intervals(r, model)[0]
               for r in record.requirements if r.key in POLE_KEYS}
    entries = _judge(record, loop, gi, model, regions, stable, metrics, band)
    sweep_block = None
    if record.sweep is not None:
        sweep_entries, sweep_block = _sweep(record, band, found)
        entries += sweep_entries
    failed = any(e.status == "fail" for e in entries)
    negative = bool(record.gain.range and record.gain.range[0] < 0) or k < 0
    gain_block: dict[str, Any] = {
        "nominal": k,
        "range": list(record.gain.range) if record.gain.range else None,
        "stable_intervals": interval_list(gi.stable),
        "crossings": [{"gain": c.gain, "frequency": c.frequency} for c in gi.crossings],
        "region_intervals": {key: interval_list(v) for key, v in regions.items()},
    }
    if loop.has_delay:
        gain_block["search_bound"] = gi.search_bound
    frequency = {"gain_crossovers": [{"frequency": c.frequency, "lag_deg": c.lag_deg}
                                     for c in ev.crossovers(0)],
                 "phase_crossovers": pc}
    n0, d0 = (loop.nz[0], loop.dz[0]) if isinstance(loop, DigitalLoop) else (loop.n[0],
                                                                              loop.d[0])
    locus = locus_facts(n0, d0, include_negative=negative)
    locus["branches"] = _branches(n0, d0, [] if loop.has_delay else gi.crossings, locus,
                                  negative)
    responses = _responses_json(ev)
    extra: dict[str, Any] = {"delay": float(loop.delay[0]) if isinstance(loop, Loop) else 0.0,
                             "pade_order": ev.pade_order, "responses": responses}
    if dev is not None:
        assert isinstance(loop, DigitalLoop)
        locus["plane"] = "z"
        extra["frequency"] = digital_frequency_block(loop, frequency)
        extra["sampling"] = _sampling_json(record, loop, dev)
        extra["continuous"] = _continuous_json(record, band)
    else:
        assert isinstance(loop, Loop)
        extra["frequency"] = frequency_block(loop, locus, frequency)
        if sweep_block is not None:
            sweep_block["envelope"] = envelope(record, make_plan(record), responses)
    return DesignResult(
        name=record.name, revision=record.revision, path=record.path,
        status="fail" if failed else "pass", title=record.title,
        gain=gain_block, locus=locus, poles=pairs(poles[0][np.isfinite(poles[0])]),
        metrics=metrics, requirements=tuple(entries), findings=tuple(found),
        sweep=sweep_block, extra=extra,
    )


AnyLoop = Loop | DigitalLoop


def _assemble(record: Record, values: Any, samples: int,
              gain: np.ndarray | None = None) -> AnyLoop:
    if record.sampling is not None:
        return assemble_digital(record, values, samples, gain=gain)
    return assemble(record, values, samples, gain=gain)


def _evaluate_any(loop: AnyLoop, record: Record, **kw: Any) -> Evaluation:
    """:func:`evaluate` for continuous loops, the z-domain version for sampled ones."""
    if isinstance(loop, DigitalLoop):
        kw.pop("gains_of_interest", None)
        return dg.evaluate(loop, **kw).base
    return evaluate(loop, pade=record.pade_order, **kw)


def _with_gains(loop: AnyLoop, gains: np.ndarray) -> AnyLoop:
    if isinstance(loop, DigitalLoop):
        return digital_with_gains(loop, gains)
    return with_gains(loop, gains)


def _phase_crossovers(loop: AnyLoop, gi: GainIntervals) -> list[dict[str, float]]:
    if isinstance(loop, Loop):
        return phase_crossovers(loop, 0, [c.frequency for c in gi.crossings])
    nyq = math.pi / loop.period
    nus = [float(discrete.omega_to_nu(np.array(c.frequency), loop.period)) for c in gi.crossings
           if 0 < c.frequency < nyq * (1 - 1e-12)]
    out = phase_crossovers(loop.w_loop(), 0, nus)
    return [{**c, "frequency": float(discrete.nu_to_omega(np.array(c["frequency"]), loop.period))}
            for c in out]


def _sampling_json(record: Record, loop: DigitalLoop, dev: dg.DigitalEvaluation
                   ) -> dict[str, Any]:
    """Period, method, z-plane poles, s-plane equivalents and the sample-instant responses."""
    assert record.sampling is not None
    sp = record.sampling
    s_poles = dev.base.poles[0]
    out: dict[str, Any] = {
        "period": sp.period, "nyquist_frequency": math.pi / sp.period,
        "controller_method": sp.controller_method, "computation_delay": sp.computation_delay,
        "plane": "z",
        "poles_s_equivalent": pairs(s_poles[np.isfinite(s_poles)]),
        "open_loop": {"num_z": [float(x) for x in loop.nz[0]],
                      "den_z": [float(x) for x in loop.dz[0]]},
    }
    sr = dev.sampled
    if sr is not None:
        def cut(a: np.ndarray) -> list[float]:
            return [float(f"{v:.6g}") for v in a[:400]]
        out["samples"] = {"t": cut(np.arange(sr.y_ref.shape[1]) * sp.period),
                          "reference": {"y": cut(sr.y_ref[0]), "u": cut(sr.u_ref[0])},
                          "load": {"y": cut(sr.y_load[0]), "u": cut(sr.u_load[0])}}
        out["intersample_ripple"] = {"reference": _value(sr.ripple_ref[0]),
                                     "load": _value(sr.ripple_load[0])}
    return out


def _continuous_json(record: Record, band: float) -> dict[str, Any] | None:
    """Metrics of the continuous design (controller in s, computation delay ignored)."""
    cont = continuous_record(record)
    if cont is None:
        return None
    try:
        loop = assemble(cont, params.values(cont, 1), 1)
        gi = gain_analysis(loop, cont)
        ev = evaluate(loop, pade=cont.pade_order, band=band, intervals=[gi])
    except (RecordInvalid, ValueError):
        return None
    return {"metrics": {key: _value(ev.metrics[key][0]) for key in METRICS},
            "stable": gi.interval_containing(record.gain.nominal) is not None}


def _branches(n0: np.ndarray, d0: np.ndarray, crossings: Any, locus: dict[str, Any],
              negative: bool) -> dict[str, Any]:
    """Traced branches for plots: gains and per-branch re/im lists (5 significant digits),
    for K >= 0 and, when the gain range reaches below 0, for K <= 0. ``crossings``: the
    stability-boundary crossings lying on this locus (none for dead time: the locus is that
    of the delay-free part)."""
    out: dict[str, Any] = {}
    crossing = [c.gain for c in crossings if math.isfinite(c.frequency)]
    extra_pos = [g for g in crossing if g > 0] + [b["gain"] for b in locus.get("breakaway", [])]
    sides = [("positive", False, extra_pos)]
    if negative:
        extra_neg = [g for g in crossing if g < 0] + [
            b["gain"] for b in locus.get("negative_gain", {}).get("breakaway", [])]
        sides.append(("negative", True, extra_neg))
    for label, neg, extra in sides:
        br = trace(n0, d0, negative=neg, extra_gains=extra, max_points=300)
        out[label] = {
            "gains": [float(f"{g:.5g}") for g in br.gains],
            "re": [[float(f"{z:.5g}") for z in col] for col in br.roots.T.real],
            "im": [[float(f"{z:.5g}") for z in col] for col in br.roots.T.imag],
        }
    return out


def _metric_at(key: str, model: PoleModel, gains: np.ndarray) -> np.ndarray:
    if model.period is not None:
        return dg.metric_at_gains(key, model.n, model.d, gains, model.period)
    return metric_at_gains(key, model.n, model.d, gains)


def _region_intervals(req: Requirement, model: PoleModel
                      ) -> tuple[list[tuple[float, float]], list[float]]:
    if model.period is not None:
        return dg.region_intervals(req.key, req.min, req.max, model.n, model.d, model.period)
    return region_intervals(req.key, req.min, req.max, model.n, model.d)


def _worst_pole_metric(req: Requirement, model: PoleModel, lo: float, hi: float,
                       holding: list[tuple[float, float]]) -> tuple[float, float]:
    """(worst value, K) of a pole metric over [lo, hi]: grid, region gaps, refinement."""
    ks = list(np.linspace(lo, hi, RANGE_SAMPLES))
    # points where the requirement fails, from the exact region intervals
    edges = sorted({lo, hi, *(x for iv in holding for x in iv if lo < x < hi)})
    ks += [0.5 * (a + b) for a, b in zip(edges[:-1], edges[1:], strict=True)]
    ks_arr = np.asarray(ks)
    vals = _metric_at(req.key, model, ks_arr)
    sign = -1.0 if req.min is not None else 1.0    # minimise sign*value... worst = min or max
    worst_i = int(np.argmin(vals) if req.min is not None else np.argmax(vals))
    k0 = float(ks_arr[worst_i])
    step = (hi - lo) / (RANGE_SAMPLES - 1) if hi > lo else 0.0
    if step > 0:
        a, b = max(lo, k0 - step), min(hi, k0 + step)
        res = minimize_scalar(
            lambda kk: -sign * float(_metric_at(req.key, model,
                                                     np.array([kk]))[0]),
            bounds=(a, b), method="bounded", options={"xatol": 1e-10 * max(1.0, abs(k0))})
        v = float(_metric_at(req.key, model, np.array([res.x]))[0])
        if (req.min is not None and v < vals[worst_i]) or (req.min is None and
                                                             v > vals[worst_i]):
            return v, float(res.x)
    return float(vals[worst_i]), k0


def _judge(record: Record, loop: AnyLoop, gi: GainIntervals, model: PoleModel,
           regions: dict[str, list[tuple[float, float]]], stable: bool,
           metrics: dict[str, Any], band: float) -> list[Entry]:
    entries: list[Entry] = []
    rng = record.gain.range
    over = [r for r in record.requirements if r.over_gain and r.key in FREQUENCY_KEYS + TIME_KEYS]
    worst = _worst_over_gain(loop, record, gi, over, band) if over and rng else {}
    for req in record.requirements:
        if req.key == "stability":
            entries.append(judge_stability(req, stable))
        else:
            entries.append(judge(req, metrics[req.key]))
        if not req.over_gain or rng is None:
            continue
        lo, hi = rng
        inside = next((iv for iv in gi.stable if iv[0] < lo and hi < iv[1]), None)
        first_bad = _first_unstable_gain(gi, lo, hi, record.gain.nominal)
        if req.key == "stability":
            entries.append(judge_stability(req, inside is not None, scope="gain",
                                           where=None if inside else {"gain": first_bad}))
        elif inside is None:
            entries.append(judge(req, None, scope="gain", where={"gain": first_bad},
                                 note="the loop is unstable inside gain.range"))
        elif req.key in ("gain_margin_db", "gain_reduction_margin_db"):
            side = 0 if req.key == "gain_margin_db" else 1
            cands = [(gain_margins(gi, kk)[side], kk) for kk in (lo, hi) if kk != 0]
            value, kk = min((c for c in cands if c[0] is not None), default=(None, lo))
            entries.append(judge(req, value, scope="gain", where={"gain": kk}))
        elif req.key in POLE_KEYS:
            value, kk = _worst_pole_metric(req, model, lo, hi, regions[req.key])
            within = any(a <= lo and hi <= b for a, b in regions[req.key])
            entry = judge(req, value, scope="gain", where={"gain": kk})
            if within != (entry.status == "pass"):
                # the exact region intervals decide; the sampled worst value is reported
                entry = Entry(key=entry.key, status="pass" if within else "fail",
                              value=entry.value, bound=entry.bound, headroom=entry.headroom,
                              scope="gain", where=entry.where,
                              note="decided by the exact region intervals")
            entries.append(entry)
        else:
            value, kk = worst[req.key]
            entries.append(judge(req, value, scope="gain", where={"gain": kk}))
    return entries


def _sweep(record: Record, band: float, found: list[fd.Finding]
           ) -> tuple[list[Entry], dict[str, Any]]:
    """Swept requirements over the plan's samples, evaluated as one batch.

    Each sample is the loop at that parameter point and at its K (the nominal K unless
    include_gain); over_gain requirements are checked per sample at that K only.
    """
    plan = make_plan(record)
    count = plan.samples
    reqs = [r for r in record.requirements if r.sweep]
    ev = _evaluate_chunked(record, plan, band, {r.key for r in reqs})
    open_samples = int(np.count_nonzero(ev.undecided))
    if open_samples:
        found.append(fd.crossing_search_undecided(int(ev.undecided.sum()), open_samples,
                                                  count))
    fails = np.zeros(count, dtype=bool)
    entries: list[Entry] = []
    worst: dict[str, Any] = {}
    for req in reqs:
        if req.key == "stability":
            bad = ~ev.stable
            i = int(np.argmax(bad)) if bad.any() else 0
            where = _where(plan, i)
            entries.append(judge_stability(req, not bad.any(), scope="sweep",
                                           where=where if bad.any() else None))
            worst["stability"] = {"value": bool(not bad.any()), **where}
        else:
            vals = ev.metrics[req.key]
            score = headroom_array(vals, req)
            bad = score < 0
            i = int(np.argmin(score))
            where = _where(plan, i)
            entries.append(judge(req, _value(vals[i]), scope="sweep", where=where))
            worst[req.key] = {"value": _value(vals[i]), **where}
        fails |= bad
    if record.sweep is not None and record.sweep.refine:
        entries = [_refine(record, plan, e, band) if e.scope == "sweep" and
                   e.key != "stability" else e for e in entries]
        for e in entries:
            if e.note.startswith("refined"):
                worst[e.key] = {"value": e.value, **(e.where or {}), "refined": True}
    failed = int(fails.sum())
    block = {"samples": count, "failed_samples": failed, "yield": (count - failed) / count,
             "methods": list(record.sweep.methods) if record.sweep else [], "worst": worst,
             "scatter": scatter(plan, ev.metrics, reqs)}
    return entries, block


#: samples evaluated per batch in a sweep: bounds memory for very large plans
SWEEP_CHUNK = 2048


@dataclass(frozen=True, slots=True)
class _SweepValues:
    metrics: dict[str, np.ndarray]
    stable: np.ndarray
    undecided: np.ndarray


def _evaluate_chunked(record: Record, plan: Any, band: float, keys: set[str]
                      ) -> _SweepValues:
    """Evaluate the plan in chunks of SWEEP_CHUNK samples (one batched call per chunk),
    computing only the metrics in ``keys`` (the swept requirements)."""
    metrics: dict[str, list[np.ndarray]] = {}
    stable: list[np.ndarray] = []
    undecided: list[np.ndarray] = []
    for start in range(0, plan.samples, SWEEP_CHUNK):
        sl = slice(start, min(start + SWEEP_CHUNK, plan.samples))
        gains = plan.gains[sl]
        count = gains.size
        values = params.values(record, count, {k: v[sl] for k, v in plan.values.items()})
        loop = _assemble(record, values, count, gain=gains)
        interest = np.column_stack([gains, *(np.full(count, x) for x in
                                             (record.gain.range or ()))])
        ev = _evaluate_any(loop, record, band=band, gains_of_interest=interest, keys=keys)
        for key, arr in ev.metrics.items():
            metrics.setdefault(key, []).append(arr)
        stable.append(ev.stable)
        undecided.append(ev.undecided if ev.undecided is not None
                         else np.zeros(count, dtype=np.int64))
    return _SweepValues(metrics={k: np.concatenate(v) for k, v in metrics.items()},
                        stable=np.concatenate(stable), undecided=np.concatenate(undecided))


#: evaluations allowed to the local search of each swept requirement (refine: true)
REFINE_EVALUATIONS = 60


def _refine(record: Record, plan: Any, entry: Entry, band: float) -> Entry:
    """Bounded local search (scipy.optimize.minimize, Powell, within the box) from the worst
    sample for a worse point; returns the entry at the refined point when one is found."""
    from scipy.optimize import minimize

    req = record.requirement(entry.key)
    assert req is not None and entry.where is not None
    axes = list(params.uncertain(record))
    if not axes:
        return entry
    lo = np.array([p.low for p in axes], dtype=float)
    hi = np.array([p.high for p in axes], dtype=float)
    start = np.array([entry.where["parameters"][p.name] for p in axes], dtype=float)
    k = float(entry.where.get("gain", record.gain.nominal))
    time_needed = req.key in TIME_KEYS

    def value_at(x: np.ndarray) -> float:
        axes_vals = {p.name: np.array([v]) for p, v in zip(axes, x, strict=True)}
        try:
            loop = _assemble(record, params.values(record, 1, axes_vals), 1,
                             gain=np.array([k]))
            ev = _evaluate_any(loop, record, band=band, time=time_needed,
                          keys=(req.key,))
        except (RecordInvalid, ValueError):
            return math.nan
        return float(ev.metrics[req.key][0])

    def cost(x: np.ndarray) -> float:
        v = value_at(np.clip(x, lo, hi))
        return headroom(v, req) if not math.isnan(v) else -1e300

    base = entry.headroom if entry.headroom is not None else -1e300
    res = minimize(cost, start, method="Powell", bounds=list(zip(lo, hi, strict=True)),
                   options={"maxfev": REFINE_EVALUATIONS, "xtol": 1e-6, "ftol": 1e-9})
    if not res.fun < base - 1e-12:
        return Entry(key=entry.key, status=entry.status, value=entry.value, bound=entry.bound,
                     headroom=entry.headroom, scope="sweep", where=entry.where,
                     note="local search found no worse point")
    x = np.clip(res.x, lo, hi)
    where = {**entry.where, "parameters": {p.name: float(v) for p, v in zip(axes, x,
                                                                            strict=True)}}
    new = judge(req, _value(value_at(x)), scope="sweep", where=where)
    return Entry(key=new.key, status=new.status, value=new.value, bound=new.bound,
                 headroom=new.headroom, scope="sweep", where=where,
                 note="refined by a local search from the worst sample")


def _where(plan: Any, i: int) -> dict[str, Any]:
    out: dict[str, Any] = {"parameters": plan.point(i)}
    if "K" in plan.names:
        out["gain"] = float(plan.gains[i])
    return out


def _band(record: Record) -> float:
    req = record.requirement("settling_time_s")
    return req.band if req is not None and req.band is not None else 0.02


def _value(x: float) -> float | None:
    return None if not np.isfinite(x) and not np.isinf(x) else float(x)


def _worst_over_gain(loop: AnyLoop, record: Record, gi: GainIntervals, reqs: list[Requirement],
                     band: float) -> dict[str, tuple[float | None, float]]:
    """Worst value and its K over gain.range for frequency and time requirements.

    The metrics are evaluated on GAIN_SAMPLES gains spread over the range (ends and nominal
    included) in one batched call; for frequency metrics the worst sample is then refined by
    a bounded scalar search between its neighbours. Time metrics keep the sampled worst
    (a simulation per refinement step would dominate the run time).
    """
    assert record.gain.range is not None
    lo, hi = record.gain.range
    ks = np.unique(np.concatenate([np.linspace(lo, hi, GAIN_SAMPLES), [record.gain.nominal]]))
    need_time = any(r.key in TIME_KEYS for r in reqs)
    keys = [r.key for r in reqs]
    ev = _evaluate_any(_with_gains(loop, ks), record, band=band,
                  intervals=[gi] * ks.size, time=need_time, keys=keys)
    out: dict[str, tuple[float | None, float]] = {}
    for req in reqs:
        vals = ev.metrics[req.key]
        score = headroom_array(vals, req)
        i = int(np.argmin(score))
        value, k_worst = _value(vals[i]), float(ks[i])
        if req.key in FREQUENCY_KEYS and value is not None and ks.size > 1:
            a, b = float(ks[max(i - 1, 0)]), float(ks[min(i + 1, ks.size - 1)])

            def f(kk: float, key: str = req.key, rq: Requirement = req) -> float:
                e = _evaluate_any(_with_gains(loop, np.array([kk])), record,
                             intervals=[gi], time=False, keys=(key,))
                v = float(e.metrics[key][0])
                return headroom(v, rq) if np.isfinite(v) else -1e300

            res = minimize_scalar(f, bounds=(a, b), method="bounded",
                                  options={"xatol": 1e-8 * max(1.0, abs(k_worst)),
                                           "maxiter": 40})
            if res.fun < score[i]:
                e = _evaluate_any(_with_gains(loop, np.array([res.x])), record,
                             intervals=[gi], time=False, keys=(req.key,))
                value, k_worst = _value(e.metrics[req.key][0]), float(res.x)
        out[req.key] = (value, k_worst)
    return out


def _compare_gain_margins(pc: list[dict[str, float]], metrics: dict[str, Any], stable: bool,
                          found: list[fd.Finding]) -> None:
    """Report when the classic phase-crossover gain margin differs from the interval one."""
    if not stable or not pc:
        return
    above = [c["gain_factor_db"] for c in pc if c["gain_factor_db"] > 0]
    classic = min(above) if above else math.inf
    exact = metrics.get("gain_margin_db")
    if exact is None:
        return
    if not (math.isinf(classic) and math.isinf(exact)) and not math.isclose(
            classic, exact, rel_tol=1e-6, abs_tol=1e-9):
        found.append(fd.classic_gain_margin_differs(classic, exact))


def _responses_json(ev: Evaluation, points: int = 400) -> dict[str, Any]:
    """Sampled step and load responses (about ``points`` points each) for the report."""
    out: dict[str, Any] = {}
    for key, r in (("reference", ev.reference), ("load", ev.load)):
        if r is None:
            continue
        t, y = r.t[0], r.y[0]
        idx = np.unique(np.linspace(0, t.size - 1, min(points, t.size)).astype(int))
        out[key] = {"t": [float(f"{v:.6g}") for v in t[idx]],
                    "y": [float(f"{v:.6g}") for v in y[idx]],
                    "final": float(r.final[0])}
    return out


def _first_unstable_gain(gi: GainIntervals, lo: float, hi: float, k: float) -> float | None:
    """The unstable gain in [lo, hi] nearest to the nominal K (a crossing, or an end)."""
    cands = [c.gain for c in gi.crossings if lo <= c.gain <= hi]
    cands += [x for x in (lo, hi) if gi.interval_containing(x) is None]
    return min(cands, key=lambda g: abs(g - k)) if cands else None


__all__ = ["check_record", "pairs"]
