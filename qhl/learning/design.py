"""Experiment design: which candidate experiments, and what share of the shots (or T gates) each gets.

The `qhl design` job. Candidates and their Fisher information per shot come from
qhl.learning.design_candidates (exact engine), the optimal shares from
qhl.learning.design_optimal (convex relaxation on the simplex; the criteria and algorithms are
stated there).

Per shot, per point or per T gate. With `per='shot'` the shares w_k are shares of the shots and
M(w) = sum_k w_k F_k is the information per shot. Otherwise each shot of candidate k costs c_k:
its number of sampled times (`per='point'`: one measurement per time, the fair unit when single
times compete with whole acquisitions) or its T gates (`per='t_count'`,
qhl.learning.design_candidates.TCostModel); the problem is solved on F_k / c_k: v_k is the share
of the budget, the shot shares follow as w_k ~ v_k / c_k.

Budget B (shots, or T gates): the total information is B M (the Fisher information adds over
independent shots), so the Cramer-Rao bounds at the budget are sqrt(diag((B M)^-1)) (Hz) and
the optimal shares do not depend on B. Default budget: what the current set spends, one shot of
each of the file's experiments. Integer shots: efficient rounding of B w (per shot), or
floor(B v_k / c_k) (per T gate).

Baseline ("current set"): equal shares of the shots over the cluster file's experiments.
Gain: how many times the budget the baseline needs to reach the optimum's criterion value
(information scales with the budget): D: exp((Phi_D(base) - Phi_D(opt)) / P) (the ratio of
det^(1/P): the D-efficiency of the baseline, inverted); A and worst: Phi(base) / Phi(opt).
"""

from dataclasses import dataclass, field
import time as _time

import numpy as np

from ..base.errors import QhlInputError
from ..exact.engine import ExactEngine
from ..spins.model import DEFAULT_FREE, build_model
from .design_candidates import TCostModel, build_candidates, candidate_fishers, select_parameters
from .design_optimal import criterion_value, efficient_rounding, optimal_shares

__all__ = ["DesignReport", "design_experiments", "PER", "CHOSEN_MIN_SHARE", "gain_factor"]

PER = ("shot", "point", "t_count")
MAX_COUNT_BUDGET = 1e15            # shots or points: integer counts stay exact in float64
CHOSEN_MIN_SHARE = 1e-3            # a candidate with a share below this is not part of the chosen set


def gain_factor(criterion, base_value, opt_value, n_params) -> float:
    """Budget factor the baseline needs to reach the optimum (module docstring)."""
    if criterion == "D":
        return float(np.exp((base_value - opt_value) / n_params))
    return float(base_value / opt_value)


def _crb(M):
    with np.errstate(invalid="ignore"):
        return np.sqrt(np.diag(np.linalg.inv(M)))


@dataclass
class DesignReport:
    """Result of `design_experiments` (see `to_json` for the keys).

    Attributes:
        candidates: list of Candidate; fishers: (K, P, P) per shot; cost_per_shot: (K,) in the unit of `per`
            (points or T gates; None per shot).
        shares: (K,) shares of the shots; budget_shares: (K,) shares of the budget (= shares per shot).
        shots: (K,) integer shots at the budget; chosen: indices with share >= CHOSEN_MIN_SHARE.
        value, baseline_value: the criterion at the budget (module docstring of design_optimal).
        crb_hz, baseline_crb_hz: (P,) Cramer-Rao bounds at the budget.
        gain: budget factor the baseline needs to match the optimum.
    """

    cluster: str
    parameters: tuple
    values_hz: np.ndarray
    selection: tuple
    criterion: str
    per: str
    budget: float
    candidates: list
    fishers: np.ndarray
    cost_per_shot: np.ndarray | None
    shares: np.ndarray
    budget_shares: np.ndarray
    shots: np.ndarray
    chosen: np.ndarray
    value: float
    baseline_value: float
    baseline_shares: np.ndarray
    crb_hz: np.ndarray
    baseline_crb_hz: np.ndarray
    gain: float
    equivalence: float
    method: str
    converged: bool
    seconds: float
    assumptions: dict = field(default_factory=dict)

    def to_json(self) -> dict:
        return {
            "cluster": self.cluster, "criterion": self.criterion, "per": self.per, "budget": self.budget,
            "parameters": list(self.parameters), "values_hz": self.values_hz,
            "selected_parameters": list(self.selection),
            "candidates": [{**c.describe(), "share": float(w), "budget_share": float(v), "shots": int(n),
                            "cost_per_shot": None if self.cost_per_shot is None else float(self.cost_per_shot[k]),
                            "chosen": bool(k in set(self.chosen.tolist())),
                            "baseline_share": float(self.baseline_shares[k])}
                           for k, (c, w, v, n) in enumerate(zip(self.candidates, self.shares,
                                                                self.budget_shares, self.shots))],
            "chosen": [self.candidates[k].name for k in self.chosen],
            "criterion_value": self.value, "baseline_criterion_value": self.baseline_value,
            "gain": self.gain, "crb_hz": dict(zip(self.parameters, self.crb_hz)),
            "baseline_crb_hz": dict(zip(self.parameters, self.baseline_crb_hz)),
            "equivalence_ratio": self.equivalence, "method": self.method, "converged": self.converged,
            "seconds": self.seconds, "assumptions": self.assumptions,
        }


def _priced(tc, cands, left: dict):
    """(the candidates whose shot tc prices in T gates, their costs); the others go into `left` as
    {name: why} (an experiment the circuits cannot compile, e.g. finite pulses)."""
    kept, costs = [], []
    for c in cands:
        try:
            costs.append(tc.shot(c))
            kept.append(c)
        except QhlInputError as e:
            left[c.name] = " ".join(str(e).split())
    return kept, np.array(costs, float)


def design_experiments(cluster, criterion: str = "D", per: str = "shot", budget=None, free=DEFAULT_FREE,
                       parameters=None, dipolar_scales=(), windows_s=(), points=None, noise=None,
                       time_points=None, include_file: bool = True, trotter_eps: float = 1e-3,
                       synthesis_eps: float = 1e-4, method: str = "auto", tol: float = 1e-6,
                       engine=None, progress=None) -> DesignReport:
    """Optimal shares of shots over candidate experiments of `cluster` (module docstring).

    Args:
        cluster: the Cluster (its experiments are the current set and candidates).
        criterion: 'D', 'A' or 'worst' (qhl.learning.design_optimal).
        per: 'shot', 'point' or 't_count' (shares of a budget of shots, sampled points or T gates).
        budget: total shots, points or T gates (default: one shot of each file experiment).
        free: glob patterns of the free parameters.
        parameters: glob patterns of the parameters the A and worst criteria look at (default all free).
        dipolar_scales, windows_s, points, noise, time_points, include_file: the candidates
            (qhl.learning.design_candidates.build_candidates).
        trotter_eps, synthesis_eps: the T-gate cost model (qhl.learning.design_candidates.TCostModel).
        method, tol: the optimiser (qhl.learning.design_optimal.optimal_shares).
        progress: optional callable(str) for stage messages.

    Returns:
        DesignReport.

    Raises:
        QhlInputError: unknown criterion or per, a non-positive budget, no experiments in the file,
            candidates that do not determine every parameter.

    Example:
        >>> from qhl import demo_cluster
        >>> rep = design_experiments(demo_cluster(), free="offset:*")
        >>> bool(rep.gain >= 1.0), len(rep.candidates)
        (True, 4)
    """
    start = _time.perf_counter()
    say = progress or (lambda msg: None)
    if per not in PER:
        raise QhlInputError(f"unknown --per {per!r}: expected one of {', '.join(PER)}", key="per")
    if not cluster.experiments:
        raise QhlInputError("the cluster defines no experiments (the current set): add an [[experiment]]",
                            source=cluster.source, key="experiment")
    if budget is not None and not (np.isfinite(budget) and budget > 0):
        raise QhlInputError(f"budget must be a positive number, got {budget!r}", key="budget")
    if budget is not None and per != "t_count" and budget > MAX_COUNT_BUDGET:
        raise QhlInputError(f"budget {budget:g} {per}s: expected at most {MAX_COUNT_BUDGET:g}", key="budget")
    if engine is None:
        engine = ExactEngine(build_model(cluster, free=free))
    model = engine.model
    if not model.free:
        raise QhlInputError("no free parameters", key="free")
    sel = select_parameters(model.free, parameters)
    cands = build_candidates(cluster, dipolar_scales, windows_s, points, noise, time_points, include_file)
    base_cands = build_candidates(cluster, noise=noise)           # the file's experiments: the current set
    costs, base_costs, assumptions = None, None, {}
    if per == "point":
        costs = np.array([float(c.times.size) for c in cands])
        base_costs = np.array([float(c.times.size) for c in base_cands])
        assumptions = {"point": "one shot of a candidate costs its number of sampled times"}
    elif per == "t_count":
        # priced before the Fisher information: a candidate the circuits cannot compile (finite pulses) is
        # left out with a note, as qhl budget does, instead of failing after the Fisher work
        say(f"T gates per shot of {len(cands)} candidates (Trotter models per dipolar scale)")
        tc = TCostModel(model, trotter_eps, synthesis_eps)
        left = {}
        cands, costs = _priced(tc, cands, left)
        base_cands, base_costs = _priced(tc, base_cands, left)
        for name, why in left.items():
            say(f"note: candidate '{name}' left out (no T-count): {why}")
        if not cands or not base_cands:
            raise QhlInputError(f"no experiment of the {'current set' if cands else 'candidates'} can be priced in "
                                f"T gates: {'; '.join(sorted(set(left.values())))}", source=cluster.source,
                                key="experiment")
        if np.any(costs <= 0):
            bad = [c.name for c, x in zip(cands, costs) if x <= 0]
            raise QhlInputError(f"candidates {', '.join(bad[:3])} cost no T gates (only t = 0): nothing to "
                                f"share a T budget over", key="candidates")
        assumptions = tc.assumptions()
        if left:
            assumptions["left_out"] = left
    cheapest = 1.0 if costs is None else float(np.min(costs))
    if budget is not None and budget < cheapest:
        unit = {"shot": "shots", "point": "sampled points", "t_count": "T gates"}[per]
        raise QhlInputError(f"a budget of {budget:g} {unit} buys no whole shot of any candidate (the cheapest shot "
                            f"costs {cheapest:.4g}): the bounds of a design need at least one", key="budget")
    say(f"Fisher information of {len(cands)} candidates ({len(model.free)} free parameters)")
    fishers = candidate_fishers(engine, cands)
    base_f = candidate_fishers(engine, base_cands)
    say(f"optimal shares ({criterion}-criterion, per {per})")
    unit_f = fishers if costs is None else fishers / costs[:, None, None]
    sol = optimal_shares(unit_f, criterion, sel, method=method, tol=tol)
    v = sol.shares
    if costs is None:
        w = v
        n_base = len(base_cands)
        B = float(n_base if budget is None else budget)
        # rounding over the chosen set only: efficient rounding gives every positive share at least one
        # shot, so shares the optimiser left at 1e-9 would take shots from the design
        shots = (efficient_rounding(np.where(w >= CHOSEN_MIN_SHARE, w, 0.0), int(round(B))) if B >= 1
                 else np.zeros(len(w), int))
        M_opt = B * np.einsum("k,kij->ij", w, fishers)
        M_base = B * base_f.mean(axis=0)
    else:
        w = (v / costs) / np.sum(v / costs)
        B = float(np.sum(base_costs) if budget is None else budget)
        shots = np.floor(B * v / costs * (1 + 1e-12))       # float: T budgets may exceed int64
        if per == "point":
            shots = shots.astype(np.int64)
        M_opt = B * np.einsum("k,kij->ij", v, unit_f)
        M_base = B * base_f.sum(axis=0) / np.sum(base_costs)      # equal shots: F and cost both averaged
    value = criterion_value(M_opt[None], [1.0], criterion, sel)
    base_value = criterion_value(M_base[None], [1.0], criterion, sel)
    base_shares = np.array([1.0 / len(base_cands) if c.kind == "file" else 0.0 for c in cands])
    chosen = np.flatnonzero(w >= CHOSEN_MIN_SHARE)
    chosen = chosen[np.argsort(-w[chosen])]
    return DesignReport(
        cluster=cluster.name, parameters=tuple(model.free), values_hz=np.asarray(model.free_values_hz, float),
        selection=tuple(model.free[i] for i in sel), criterion=criterion, per=per, budget=B, candidates=cands,
        fishers=fishers, cost_per_shot=costs, shares=w, budget_shares=v, shots=shots, chosen=chosen,
        value=value, baseline_value=base_value, baseline_shares=base_shares, crb_hz=_crb(M_opt),
        baseline_crb_hz=_crb(M_base), gain=gain_factor(criterion, base_value, value, len(sel) if criterion != "D"
                                                       else len(model.free)),
        equivalence=sol.equivalence, method=sol.method, converged=sol.converged,
        seconds=_time.perf_counter() - start, assumptions=assumptions)
