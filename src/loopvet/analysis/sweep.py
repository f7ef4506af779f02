"""Parameter-variation sweeps: sampling plans and worst cases over the samples.

Plans (record format "Sweep"): ``corners`` (every vertex of the uncertainty box), ``grid``
(``levels`` per axis), ``lhs``, ``sobol``, ``random`` (scipy.stats.qmc, seeded so that a run
repeats exactly on every machine); a list of methods concatenates their samples. The axes
are the uncertain parameters in record order, plus K over gain.range with
``include_gain``. The nominal point is always sample 0. Derived parameters follow their
inputs (evaluated on the whole batch).
"""

from __future__ import annotations

import itertools
import warnings
from dataclasses import dataclass

import numpy as np
from scipy.stats import qmc

from ..record import params
from ..record.model import Record

MAX_SAMPLES = 100_000


@dataclass(frozen=True, slots=True)
class Plan:
    names: tuple[str, ...]            # axis names ("K" for the gain axis)
    values: dict[str, np.ndarray]     # uncertain parameter -> (S,)
    gains: np.ndarray                 # (S,)

    @property
    def samples(self) -> int:
        return int(self.gains.size)

    def point(self, i: int) -> dict[str, float]:
        out = {n: float(v[i]) for n, v in self.values.items()}
        return out


def _unit(method: str, dims: int, record: Record) -> np.ndarray:
    plan = record.sweep
    assert plan is not None
    if dims == 0:
        return np.zeros((0, 0))
    if method == "corners":
        return np.array(list(itertools.product((0.0, 1.0), repeat=dims)))
    if method == "grid":
        levels = np.linspace(0.0, 1.0, plan.levels)
        return np.array(list(itertools.product(levels, repeat=dims)))
    n = plan.samples
    if method == "lhs":
        return qmc.LatinHypercube(d=dims, seed=plan.seed).random(n)
    if method == "sobol":
        with warnings.catch_warnings():   # sample counts need not be powers of two here
            warnings.simplefilter("ignore", UserWarning)
            return qmc.Sobol(d=dims, scramble=True, seed=plan.seed).random(n)
    rng = np.random.default_rng(plan.seed)
    return rng.random((n, dims))


def make_plan(record: Record) -> Plan:
    """The sample set of ``record.sweep`` (nominal first), scaled to the uncertainty box."""
    sweep = record.sweep
    assert sweep is not None
    axes = list(params.uncertain(record))
    lows = [p.low for p in axes]
    highs = [p.high for p in axes]
    noms = [p.nominal for p in axes]
    names = [p.name for p in axes]
    if sweep.include_gain and record.gain.range is not None:
        lows.append(record.gain.range[0])
        highs.append(record.gain.range[1])
        noms.append(record.gain.nominal)
        names.append("K")
    lo = np.asarray(lows, dtype=float)
    hi = np.asarray(highs, dtype=float)
    dims = len(names)
    blocks = [np.asarray(noms, dtype=float)[None, :]]
    for method in sweep.methods:
        u = _unit(method, dims, record)
        blocks.append(lo + u * (hi - lo))
    pts = np.concatenate(blocks, axis=0)[:MAX_SAMPLES]
    values = {n: pts[:, j] for j, n in enumerate(names) if n != "K"}
    gains = pts[:, names.index("K")] if "K" in names else np.full(pts.shape[0],
                                                                   record.gain.nominal)
    return Plan(names=tuple(names), values=values, gains=gains)
