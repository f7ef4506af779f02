"""Sweep benchmark: cost per parameter sample of ``loopvet check`` against two references.

Generates a synthetic fleet of continuous-time loops with parameter sweeps, times loopvet on
it in-process, and compares the cost per sample with

  (a) a per-sample script: for each sample, np.roots of the characteristic polynomial and a
      dense 2000-point logarithmic frequency grid for gain margin, phase margin and Ms;
  (b) a floor: one batched np.linalg.eigvals call per record on the companion matrices of
      the same characteristic polynomials (poles only, nothing else).

Only figures are printed; nothing is asserted. Machines are noisy: read medians and ratios.

    python benchmarks/sweep_benchmark.py                       # 40 records x 256 samples
    python benchmarks/sweep_benchmark.py --quick               # 5 records x 64 samples
    python benchmarks/sweep_benchmark.py --records 200 --samples 256 --seed 1
"""

from __future__ import annotations

import argparse
import io
import math
import os
import platform
import resource
import statistics
import sys
import tempfile
import time
from contextlib import redirect_stdout
from dataclasses import dataclass

import numpy as np

from loopvet import __version__
from loopvet.analysis.design import _sweep as sweep_stage
from loopvet.analysis.evaluate import evaluate
from loopvet.analysis.sweep import make_plan
from loopvet.lti.loop import Loop, assemble
from loopvet.record import params
from loopvet.record.load import read_record
from loopvet.report.files import write_atomic
from loopvet.results import dumps
from loopvet.run import Settings, check_fleet

PADE_ORDER = 4          # fixed in the generated records (delay_approximation) and in (a), (b)
GRID_POINTS = 2000      # frequency grid of the per-sample script (a)
REPEATS = 3

REQUIREMENTS = """\
requirements:
  stability: {over_gain: false}
  gain_margin_db: {min: 6}
  phase_margin_deg: {min: 30}
  sensitivity_peak: {max: 2.0}
  damping_ratio: {min: 0.15}
"""


# ------------------------------------------------------------------ synthetic fleet

@dataclass
class Spec:
    name: str
    text: str           # YAML with "{SWEEP}" where the sweep line goes
    delay: bool
    order: int
    controller: str


def _pade_desc(t: float, order: int) -> tuple[np.ndarray, np.ndarray]:
    """Diagonal Pade approximant of exp(-s t), (num, den) in descending powers of s."""
    k = np.arange(order + 1)
    c = np.array([math.factorial(2 * order - i) * math.factorial(order)
                  / (math.factorial(2 * order) * math.factorial(i) * math.factorial(order - i))
                  for i in k])
    den = c * t ** k
    num = den * (-1.0) ** k
    return num[::-1], den[::-1]


def _unstable(n: np.ndarray, d: np.ndarray, k: float) -> bool:
    r = np.roots(np.polyadd(d, k * n))
    return bool(np.any(r.real >= -1e-12 * np.maximum(1.0, np.abs(r))))


def _ultimate_gain(n: np.ndarray, d: np.ndarray) -> float:
    """Smallest K > 0 with D + K N unstable: a log K grid, then bisection (data only)."""
    grid = np.geomspace(1e-4, 1e5, 181)
    bad = [k for k in grid if _unstable(n, d, k)]
    if not bad:
        return math.inf
    hi = bad[0]
    lo = grid[max(int(np.searchsorted(grid, hi)) - 1, 0)] if hi > grid[0] else 0.0
    for _ in range(40):
        mid = 0.5 * (lo + hi)
        lo, hi = (lo, mid) if _unstable(n, d, mid) else (mid, hi)
    return lo


def _fmt(x: float) -> str:
    return f"{x:.4g}"


def make_spec(i: int, rng: np.random.Generator) -> Spec:
    order = int(rng.integers(3, 9))
    pairs = int(rng.integers(0, order // 2 + 1))
    if order - 2 * pairs == 0 and rng.random() < 0.5:
        pairs -= 1                      # keep at least one real pole most of the time
    reals = order - 2 * pairs
    taus = np.sort(10 ** rng.uniform(-1.0, 1.0, reals))[::-1]
    wns = 10 ** rng.uniform(-0.5, 1.0, pairs)
    zetas = rng.uniform(0.2, 0.8, pairs)
    kg = float(10 ** rng.uniform(-0.5, 1.0))
    delay = bool(rng.random() < 1 / 3)
    lag = float(taus.sum() + (2 * zetas / wns).sum())
    dead = float(rng.uniform(0.02, 0.1) * lag) if delay else 0.0

    # uncertain parameters: kg always, then a time constant, a natural frequency, the delay
    cands = ["kg"] + [f"t{j + 1}" for j in range(min(reals, 2))] + \
            [f"w{j + 1}" for j in range(min(pairs, 1))] + (["dead"] if delay else [])
    n_unc = int(rng.integers(2, 5))
    chosen = ["kg"] + list(rng.permutation(cands[1:])[: n_unc - 1])
    if len(chosen) < 2:                 # only kg available: make the first pole uncertain
        chosen.append("t1" if reals else "w1")
    values = {"kg": kg, **{f"t{j + 1}": float(t) for j, t in enumerate(taus)},
              **{f"w{j + 1}": float(w) for j, w in enumerate(wns)}, "dead": dead}

    def sym(nm: str) -> str:
        return nm if nm in chosen else _fmt(values[nm])

    factors = [f"({sym(f't{j + 1}')}*s + 1)" for j in range(reals)]
    factors += [f"((s/{sym(f'w{j + 1}')})^2 + {_fmt(2 * zetas[j])}*s/{sym(f'w{j + 1}')} + 1)"
                for j in range(pairs)]
    transfer = f"{sym('kg')} / ({' * '.join(factors)})"

    # nominal plant polynomials (descending), with the rounded numbers the record holds
    vals = {k: float(_fmt(v)) for k, v in values.items()}
    g_den = np.array([1.0])
    for j in range(reals):
        g_den = np.polymul(g_den, [vals[f"t{j + 1}"], 1.0])
    for j in range(pairs):
        w = vals[f"w{j + 1}"]
        g_den = np.polymul(g_den, [1 / w ** 2, float(_fmt(2 * zetas[j])) / w, 1.0])
    g_num = np.array([vals["kg"]])

    pid = rng.random() < 0.5
    ti = float(_fmt(0.8 * lag))
    if pid:
        td = float(_fmt(0.2 * ti))
        tf = float(_fmt(0.1 * td))
        c_num = np.polyadd(np.polymul([ti, 0.0], [tf, 1.0]),
                           np.polyadd([tf, 1.0], [ti * td, 0.0, 0.0]))
        c_den = np.polymul([ti, 0.0], [tf, 1.0])
    else:
        c_num, c_den = np.array([ti, 1.0]), np.array([ti, 0.0])
    n = np.polymul(c_num, g_num)
    d = np.polymul(c_den, g_den)
    if delay:
        pn, pd = _pade_desc(vals["dead"], PADE_ORDER)
        n, d = np.polymul(n, pn), np.polymul(d, pd)
    ku = _ultimate_gain(n, d)
    kc = float(_fmt(ku / 3.0 if math.isfinite(ku) else 1.0))
    if pid:
        ctrl = f"pid: {{kc: {_fmt(kc)}, ti: {_fmt(ti)}, td: {_fmt(td)}, " \
               f"derivative_filter: {_fmt(tf)}}}"
    else:
        ctrl = f"pid: {{kp: {_fmt(kc)}, ki: {_fmt(kc / ti)}}}"

    lines = ["loopvet: 1", f"name: bench-{i:04d}", "revision: 1",
             f"title: synthetic loop {i} (order {order}{', dead time' if delay else ''})",
             "parameters:"]
    for nm in chosen:
        lines.append(f"  {nm}: {{nominal: {_fmt(values[nm])}, tolerance: 20%}}")
    lines.append("plant:")
    lines.append(f'  transfer: "{transfer}"')
    if delay:
        lines.append(f"  delay: {sym('dead')}")
    lines.append("controller:")
    lines.append(f"  {ctrl}")
    lines.append("gain: 1.0")
    if delay:
        lines.append(f"delay_approximation: {{pade: {PADE_ORDER}}}")
    text = "\n".join(lines) + "\n" + REQUIREMENTS + "{SWEEP}"
    return Spec(name=f"bench-{i:04d}", text=text, delay=delay, order=order,
                controller="PID" if pid else "PI")


def write_fleet(folder: str, specs: list[Spec], samples: int, seed: int, sweep: bool) -> None:
    os.makedirs(folder, exist_ok=True)
    for i, sp in enumerate(specs):
        line = (f"sweep: {{method: lhs, samples: {samples}, seed: {seed * 100003 + i}}}\n"
                if sweep else "")
        with open(os.path.join(folder, sp.name + ".yaml"), "w", encoding="utf-8") as fh:
            fh.write(sp.text.replace("{SWEEP}", line))


# ------------------------------------------------------------------ loopvet

def run_loopvet(folder: str, out: str, jobs: int) -> tuple[float, dict]:
    """What ``loopvet check <folder> --out <out> --format json --jobs <jobs>`` does,
    timed in-process."""
    settings = Settings(paths=(folder,), out=out, format="json", jobs=jobs)
    t0 = time.perf_counter()
    fleet = check_fleet(settings)
    payload = dumps(fleet.to_json())
    write_atomic(os.path.join(out, "results.json"), payload)
    with redirect_stdout(io.StringIO()):              # --format json prints the payload
        sys.stdout.write(payload)
    elapsed = time.perf_counter() - t0
    return elapsed, fleet.to_json()


def time_sweep_stage(folder: str, names: list[str]) -> list[float]:
    """Seconds spent in the sweep stage alone (plan, batched evaluation, worst cases) per
    record, as ``loopvet check`` runs it after the nominal analysis."""
    out = []
    for nm in names:
        record = read_record(os.path.join(folder, nm + ".yaml"))
        t0 = time.perf_counter()
        sweep_stage(record, 0.02, [])
        out.append(time.perf_counter() - t0)
    return out


def maxrss_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0   # Linux: KiB


# ------------------------------------------------------------------ sample reconstruction

@dataclass
class Batch:
    path: str
    delay: bool
    loop: Loop
    pade: int | None
    interest: np.ndarray


def batch_of(path: str, limit: int | None = None) -> Batch:
    """The record's sweep samples (nominal first), optionally the first ``limit`` only."""
    record = read_record(path)
    plan = make_plan(record)
    count = plan.samples if limit is None else min(limit, plan.samples)
    axes = {k: v[:count] for k, v in plan.values.items()}
    gains = plan.gains[:count]
    vals = params.values(record, count, axes)
    loop = assemble(record, vals, count, gain=gains)
    interest = np.array([[k, *(record.gain.range or ())] for k in gains])
    return Batch(path=path, delay=loop.has_delay, loop=loop, pade=record.pade_order,
                 interest=interest)


def _desc(row: np.ndarray) -> np.ndarray:
    """Ascending coefficients -> descending, leading zeros dropped."""
    out = np.trim_zeros(row[::-1], "f")
    return out if out.size else np.zeros(1)


# ------------------------------------------------------------------ reference (a)

def per_sample_script(b: Batch) -> dict[str, np.ndarray]:
    """Per sample, what a hand-written script does: np.roots + a 2000-point log grid."""
    lp = b.loop
    n0, d0 = _desc(lp.n[0]), _desc(lp.d[0])
    mags = np.abs(np.concatenate([np.roots(n0), np.roots(d0)]))
    mags = mags[mags > 1e-12]
    w = np.geomspace(mags.min() / 100.0, mags.max() * 100.0, GRID_POINTS)
    jw = 1j * w
    s_count = lp.samples
    out = {k: np.full(s_count, np.nan) for k in ("stable", "damping_ratio", "gain_margin_db",
                                                 "phase_margin_deg", "sensitivity_peak")}
    for i in range(s_count):
        n, d = _desc(lp.n[i]), _desc(lp.d[i])
        k, t = float(lp.gain[i]), float(lp.delay[i])
        if t > 0:
            pn, pd = _pade_desc(t, PADE_ORDER)
            char = np.polyadd(np.polymul(d, pd), k * np.polymul(n, pn))
        else:
            char = np.polyadd(d, k * n)
        r = np.roots(char)
        stable = bool(np.all(r.real < 0))
        out["stable"][i] = stable
        out["damping_ratio"][i] = float(np.min(-r.real / np.abs(r)))
        L = k * np.polyval(n, jw) / np.polyval(d, jw)
        if t > 0:
            L = L * np.exp(-jw * t)
        mag = np.abs(L)
        ph = np.degrees(np.unwrap(np.angle(L)))
        lm = np.log(mag)
        # gain crossovers: |L| through 1, interpolated linearly in log w
        j = np.nonzero((lm[:-1] > 0) != (lm[1:] > 0))[0]
        if j.size:
            f = lm[j] / (lm[j] - lm[j + 1])
            phc = ph[j] + f * (ph[j + 1] - ph[j])
            lag = np.mod(180.0 + phc, 360.0)
            pm = lag.min() if stable else np.where(lag > 180, lag - 360, lag).min()
        else:
            pm = math.inf
        # phase crossovers: phase through -180 (mod 360), interpolated
        cyc = np.floor((ph + 180.0) / 360.0)
        j = np.nonzero(cyc[:-1] != cyc[1:])[0]
        if j.size and stable:
            target = 360.0 * np.maximum(cyc[j], cyc[j + 1]) - 180.0
            f = (target - ph[j]) / (ph[j + 1] - ph[j])
            gm_all = -20.0 / np.log(10.0) * (lm[j] + f * (lm[j + 1] - lm[j]))
            pos = gm_all[gm_all > 0]
            gm = pos.min() if pos.size else math.inf
        else:
            gm = math.inf if stable else math.nan
        out["phase_margin_deg"][i] = pm
        out["gain_margin_db"][i] = gm
        out["sensitivity_peak"][i] = float(np.max(1.0 / np.abs(1.0 + L))) if stable else np.nan
    return out


# ------------------------------------------------------------------ reference (b)

def characteristic_ascending(b: Batch) -> np.ndarray:
    lp = b.loop
    c = lp.characteristic_pade(PADE_ORDER) if b.delay else lp.characteristic()
    while c.shape[1] > 1 and np.all(c[:, -1] == 0):
        c = c[:, :-1]
    return c


def floor_eigvals(c: np.ndarray) -> np.ndarray:
    """Companion matrices of the (S, n+1) ascending polynomials, one eigvals call."""
    s, m = c.shape
    deg = m - 1
    comp = np.zeros((s, deg, deg))
    comp[:, 0, :] = -(c[:, -2::-1] / c[:, -1:])
    idx = np.arange(deg - 1)
    comp[:, idx + 1, idx] = 1.0
    return np.linalg.eigvals(comp)


# ------------------------------------------------------------------ main

def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--records", type=int, default=40)
    ap.add_argument("--samples", type=int, default=256, help="lhs samples per record")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--quick", action="store_true", help="5 records x 64 samples")
    ap.add_argument("--jobs", type=int, default=1,
                    help="loopvet worker processes (default 1: cost per core; the CLI "
                         "default is one per CPU)")
    ap.add_argument("--repeats", type=int, default=REPEATS, help="timed runs (median)")
    ap.add_argument("--ref-samples", type=int, default=0, metavar="M",
                    help="time reference (a) on the first M samples of each record and "
                         "extrapolate (0 = all samples, the default)")
    ap.add_argument("--accuracy-samples", type=int, default=32, metavar="M",
                    help="compare metrics with (a) on the first M samples of each record "
                         "(loopvet re-evaluated there, untimed; 0 = all; default 32)")
    ap.add_argument("--profile", action="store_true",
                    help="afterwards, profile one loopvet run and print the top entries")
    ap.add_argument("--keep", metavar="DIR", help="write the fleet here and keep it")
    ap.add_argument("--memory-samples", type=int, default=0, metavar="N",
                    help="instead of the comparison: run 'loopvet check' in a child process "
                         "on two records (order 8, with and without dead time) with an "
                         "N-sample lhs sweep each, and print its time and peak RSS")
    args = ap.parse_args(argv)
    if args.memory_samples:
        return memory_case(args.memory_samples, args.seed, args.keep)
    if args.quick:
        args.records, args.samples = 5, 64
    limit = args.ref_samples or None
    acc_limit = args.accuracy_samples or None
    repeats = max(1, args.repeats)

    rng = np.random.default_rng(args.seed)
    specs = [make_spec(i, rng) for i in range(args.records)]
    tmp = tempfile.TemporaryDirectory(prefix="loopvet-bench-")
    base = args.keep or tmp.name
    fleet_dir = os.path.join(base, "fleet")
    nosweep_dir = os.path.join(base, "fleet-nominal")
    write_fleet(fleet_dir, specs, args.samples, args.seed, sweep=True)
    write_fleet(nosweep_dir, specs, args.samples, args.seed, sweep=False)

    print(f"loopvet {__version__} sweep benchmark | python {platform.python_version()}, "
          f"numpy {np.__version__}, {os.cpu_count()} CPU(s), {platform.machine()}")
    orders = [s.order for s in specs]
    print(f"fleet: {args.records} records (plant order {min(orders)}-{max(orders)}, "
          f"{sum(s.delay for s in specs)} with dead time, "
          f"{sum(s.controller == 'PID' for s in specs)} PID / "
          f"{sum(s.controller == 'PI' for s in specs)} PI), lhs {args.samples} samples "
          f"each, seed {args.seed}")
    print("requirements: stability, gain_margin_db, phase_margin_deg, sensitivity_peak, "
          "damping_ratio.\nTime responses are excluded from the comparison: the references "
          "below compute none.")

    # ---- loopvet (first, so that maxrss reflects it and not the references)
    rss_before = maxrss_mib()
    times, result = [], {}
    for rep in range(repeats):
        t, result = run_loopvet(fleet_dir, os.path.join(base, f"out{rep}"), args.jobs)
        times.append(t)
    rss_after = maxrss_mib()
    nominal_times = [run_loopvet(nosweep_dir, os.path.join(base, f"out-nominal{r}"),
                                 args.jobs)[0] for r in range(repeats)]
    stage_runs = [time_sweep_stage(fleet_dir, [s.name for s in specs])
                  for _ in range(repeats)]
    stage_times = [sum(run) for run in stage_runs]
    designs = result["designs"]
    invalid = [d["name"] for d in designs if d["status"] == "invalid"]
    total = sum(d["sweep"]["samples"] for d in designs if d.get("sweep"))
    sample_yield = [d["sweep"]["yield"] for d in designs if d.get("sweep")]
    t_lv = statistics.median(times)
    t_nom = statistics.median(nominal_times)
    us_lv = t_lv / total * 1e6
    us_lv_marginal = max(t_lv - t_nom, 0.0) / total * 1e6
    us_stage = statistics.median(stage_times) / total * 1e6
    print(f"\nloopvet check: {len(designs)} records, {total} samples "
          f"(plan size incl. nominal), {sum(d['status'] == 'pass' for d in designs)} pass / "
          f"{sum(d['status'] == 'fail' for d in designs)} fail / {len(invalid)} invalid; "
          f"median sweep yield {statistics.median(sample_yield) if sample_yield else 0:.2f}")
    if invalid:
        print("  invalid: " + ", ".join(invalid[:5]))
    runs = ", ".join(f"{t:.2f}" for t in times)
    print(f"  wall time, {repeats} runs (--jobs {args.jobs}): {runs} s; median {t_lv:.2f} s")
    print(f"  same records without sweep (nominal analysis only), median {t_nom:.2f} s")
    print(f"  peak RSS (ru_maxrss): {rss_after:.0f} MiB after the runs, "
          f"{rss_before:.0f} MiB before (growth {rss_after - rss_before:.0f} MiB)")

    # ---- references
    batches_all = [batch_of(os.path.join(fleet_dir, s.name + ".yaml")) for s in specs]
    batches_sub = (batches_all if limit is None else
                   [batch_of(b.path, limit) for b in batches_all])
    sub_total = sum(b.loop.samples for b in batches_sub)

    a_times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        for b in batches_sub:
            per_sample_script(b)
        a_times.append(time.perf_counter() - t0)
    us_a = statistics.median(a_times) / sub_total * 1e6

    chars = [characteristic_ascending(b) for b in batches_all]
    b_runs = []
    for _ in range(repeats):
        run = []
        for c in chars:
            t0 = time.perf_counter()
            floor_eigvals(c)
            run.append(time.perf_counter() - t0)
        b_runs.append(run)
    b_times = [sum(run) for run in b_runs]
    b_samples = sum(c.shape[0] for c in chars)
    us_b = statistics.median(b_times) / b_samples * 1e6

    # ---- accuracy: loopvet's per-sample metrics on the same samples (not timed)
    batches_acc = (batches_all if acc_limit is None else
                   [batch_of(b.path, acc_limit) for b in batches_all])
    acc_total = sum(b.loop.samples for b in batches_acc)
    rel_pm, rel_ms, d_gm, agree, compared = [], [], [], 0, 0
    for b in batches_acc:
        a = per_sample_script(b)
        ev = evaluate(b.loop, pade=b.pade, gains_of_interest=b.interest, time=False)
        st_a = a["stable"].astype(bool)
        agree += int(np.sum(ev.stable == st_a))
        compared += st_a.size
        both = ev.stable & st_a
        pm_l, pm_a = ev.metrics["phase_margin_deg"], a["phase_margin_deg"]
        ok = both & np.isfinite(pm_l) & np.isfinite(pm_a) & (np.abs(pm_l) > 0)
        rel_pm.extend(np.abs(pm_a[ok] - pm_l[ok]) / np.abs(pm_l[ok]))
        ms_l, ms_a = ev.metrics["sensitivity_peak"], a["sensitivity_peak"]
        ok = both & np.isfinite(ms_l) & np.isfinite(ms_a)
        rel_ms.extend((ms_l[ok] - ms_a[ok]) / ms_l[ok])
        gm_l, gm_a = ev.metrics["gain_margin_db"], a["gain_margin_db"]
        ok = both & np.isfinite(gm_l) & np.isfinite(gm_a)
        d_gm.extend(np.abs(gm_l[ok] - gm_a[ok]))

    def med(x: list[float]) -> float:
        return float(np.median(x)) if len(x) else math.nan

    def mx(x: list[float]) -> float:
        return float(np.max(x)) if len(x) else math.nan

    sub_note = ("all samples" if limit is None else
                f"first {limit} samples per record, {sub_total} in all; per-sample cost "
                "extrapolated")
    print(f"\nper-sample cost (median of {repeats} runs)")
    print(f"  {'method':<52}{'us/sample':>12}")
    print(f"  {'loopvet check (wall time / total samples)':<52}{us_lv:>12.1f}")
    print(f"  {'loopvet, sweep only (minus the no-sweep run)':<52}{us_lv_marginal:>12.1f}")
    print(f"  {'loopvet sweep stage alone (timed per record)':<52}{us_stage:>12.1f}")
    print(f"  {'(a) per-sample script (roots + 2000-pt grid)':<52}{us_a:>12.1f}")
    print(f"  {'(b) floor: batched eigvals of D + K N':<52}{us_b:>12.2f}")
    print(f"  {'ratio (a) / loopvet':<52}{us_a / us_lv:>12.3g}")
    print(f"  {'ratio (a) / loopvet sweep-only':<52}"
          f"{us_a / us_lv_marginal if us_lv_marginal > 0 else math.inf:>12.3g}")
    print(f"  {'ratio loopvet / (b)':<52}{us_lv / us_b:>12.4g}")
    print(f"  {'ratio loopvet sweep-only / (b)':<52}{us_lv_marginal / us_b:>12.4g}")
    print(f"  {'ratio (a) / loopvet sweep stage':<52}{us_a / us_stage:>12.3g}")
    print(f"  {'ratio loopvet sweep stage / (b)':<52}{us_stage / us_b:>12.4g}")
    print("  by loop class (sweep stage and (b) per record, summed over the class; medians):")
    for label, members in (("without dead time", [i for i, sp in enumerate(specs)
                                                  if not sp.delay]),
                           ("with dead time (Pade for (b))", [i for i, sp in enumerate(specs)
                                                               if sp.delay])):
        if not members:
            continue
        n_cls = sum(chars[i].shape[0] for i in members)
        st = statistics.median([sum(run[i] for i in members) for run in stage_runs])
        fl = statistics.median([sum(run[i] for i in members) for run in b_runs])
        print(f"    {label:<31} {len(members):>3} records: stage {st / n_cls * 1e6:7.1f} "
              f"us/sample, (b) {fl / n_cls * 1e6:6.2f} us/sample, ratio {st / fl:5.2f}")
    print(f"  (a) timed on {sub_note}; (b) on all {b_samples} samples, companion build + "
          "eigvals only\n  (characteristic polynomials assembled beforehand, untimed). "
          f"Dead-time loops: Pade({PADE_ORDER}) for poles in all three.")
    acc_note = "all samples" if acc_limit is None else f"first {acc_limit} per record"
    print(f"\naccuracy, loopvet vs (a) on {acc_total} samples ({acc_note})")
    print(f"  stability verdicts agree on {agree}/{compared} samples")
    print(f"  phase margin: median relative difference {med(rel_pm):.2e}, max {mx(rel_pm):.2e} "
          f"({len(rel_pm)} stable samples)")
    print(f"  Ms: median (loopvet - (a))/loopvet {med(rel_ms):.2e}, max {mx(rel_ms):.2e}; "
          f"gain margin: median |difference| {med(d_gm):.2e} dB, max {mx(d_gm):.2e} dB")
    print("  loopvet's crossovers are exact (polynomial roots, Newton-polished) and its peaks "
          "refined;\n  (a) is limited by its grid (crossings interpolated between points, "
          "Ms = largest grid value).")
    if args.profile:
        profile_once(fleet_dir, os.path.join(base, "out-profile"))
    tmp.cleanup()
    return 0


def memory_case(samples: int, seed: int, keep: str | None) -> int:
    """Peak memory of one ``loopvet check`` process on two records with huge sweeps."""
    import subprocess

    rng = np.random.default_rng(seed)
    specs: list[Spec] = []
    i = 0
    while len(specs) < 2:                       # one order-8 loop with, one without dead time
        sp = make_spec(i, rng)
        i += 1
        if sp.order == 8 and sp.delay == (len(specs) == 0):
            specs.append(sp)
    tmp = tempfile.TemporaryDirectory(prefix="loopvet-memory-")
    base = keep or tmp.name
    folder = os.path.join(base, "fleet-memory")
    write_fleet(folder, specs, samples, seed, sweep=True)
    code = ("import sys, resource; from loopvet.cli import main; rc = main(sys.argv[1:]); "
            "print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss, file=sys.stderr); "
            "sys.exit(rc)")
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", code, "check", folder, "--out",
                           os.path.join(base, "out-memory"), "--jobs", "1"],
                          capture_output=True, text=True, check=False)
    elapsed = time.perf_counter() - t0
    rss = int(proc.stderr.strip().splitlines()[-1]) / 1024.0
    print(f"memory case: 2 records (order 8; one with dead time), lhs {samples} samples each, "
          f"--jobs 1, one run")
    print(f"  exit code {proc.returncode}; wall time {elapsed:.1f} s "
          f"({elapsed / (2 * (samples + 1)) * 1e6:.0f} us/sample incl. start-up)")
    print(f"  peak RSS of the loopvet process: {rss:.0f} MiB")
    print("  " + proc.stdout.strip().replace("\n", "\n  "))
    tmp.cleanup()
    return 0


def profile_once(folder: str, out: str, records: int = 3, top: int = 15) -> None:
    """loopvet (--jobs 1) on the first ``records`` records under cProfile; top entries."""
    import cProfile
    import pstats

    files = sorted(os.path.join(folder, f) for f in os.listdir(folder))[:records]
    settings = Settings(paths=(folder,), out=out, format="json", jobs=1)
    prof = cProfile.Profile()
    prof.enable()
    check_fleet(settings, files=files)
    prof.disable()
    text = io.StringIO()
    pstats.Stats(prof, stream=text).sort_stats("tottime").print_stats(top)
    print(f"\ncProfile of loopvet (--jobs 1) on the first {len(files)} records, "
          f"top {top} by own time:")
    lines = text.getvalue().splitlines()
    start = next((i for i, ln in enumerate(lines) if "ncalls" in ln), 0)
    for ln in lines[start:]:
        if ln.strip():
            print("  " + ln.replace(os.path.dirname(os.path.dirname(__file__)) + os.sep, ""))


if __name__ == "__main__":
    sys.exit(main())
