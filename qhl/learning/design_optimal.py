"""Optimal shares of shots over candidate experiments, from plain Fisher matrices.

Problem (the convex relaxation of choosing how many shots each candidate gets; Kiefer, J. R.
Stat. Soc. B 21, 272 (1959); F. Pukelsheim, "Optimal Design of Experiments", 1993, ch. 5-9):
candidate k contributes the Fisher information F_k (P x P, 1/Hz^2) per shot; shares w lie on the
simplex (w_k >= 0, sum w_k = 1) and the design's information per shot is
    M(w) = sum_k w_k F_k.
Criteria (each minimised; A is a fixed selection of parameters, default all):
    'D'      -log det M(w)                       (volume of the confidence ellipsoid)
    'A'      tr(A^T M(w)^-1 A)                    (sum of the chosen parameters' variances, Hz^2)
    'worst'  max_{i in chosen} (M(w)^-1)_ii        (the worst Cramer-Rao variance of chosen parameters)
Per unit cost (T gates): with c_k the cost of one shot of candidate k and v_k the share of the
budget spent on it, M = sum_k v_k (F_k / c_k): the same problem on F_k / c_k; shot shares follow
as w_k proportional to v_k / c_k.

Algorithms:
    'multiplicative' (D only): w_k <- w_k d_k(w) / P with d_k = tr(M^-1 F_k) (Silvey, Titterington
        and Torsney, Commun. Stat. Theory Methods 7, 1379 (1978)); it increases det M at every step
        and stops when the equivalence theorem holds to `tol`: max_k d_k <= P (1 + tol).
    'auto': D starts multiplicative and finishes with SLSQP; A and worst use SLSQP.
    'slsqp' (any criterion): scipy.optimize.minimize(method='SLSQP') over w with bounds [0, 1] and
        the equality sum w = 1, with analytic gradients
            d(-log det M)/dw_k = -tr(M^-1 F_k),
            d tr(A^T M^-1 A)/dw_k = -tr(A^T M^-1 F_k M^-1 A),
        and, for 'worst', the epigraph form: minimise s subject to (M^-1)_ii <= s.
    Many candidates (more than ACTIVE_SET_MIN): SLSQP's cost grows as K^3, so it runs on a support
        that grows (column generation) until no candidate outside it violates the equivalence
        theorem by more than ACTIVE_SET_EQ_TOL; A and worst start from a few multiplicative steps.
Equivalence theorems at the optimum (Kiefer and Wolfowitz, Canad. J. Math. 12, 363 (1960);
Pukelsheim 1993, ch. 7): D: max_k tr(M^-1 F_k) = P; A: max_k tr(A^T M^-1 F_k M^-1 A) = tr(A^T M^-1 A);
worst: the A form weighted by the optimal multipliers mu of the epigraph constraints (a saddle point).
`DesignSolution.equivalence` reports max_k over the candidates divided by the right-hand side
(1 at the optimum, >= 1 anywhere).

Numerics: the matrices are rescaled by the diagonal of the equal-share M (the D optimum and the
A and worst values do not depend on this, the A and worst criteria are carried over exactly);
a ridge RIDGE x the largest eigenvalue keeps M invertible at the simplex boundary (it moves
the criteria by about RIDGE relative; reported values are recomputed without it).
"""

from dataclasses import dataclass

import numpy as np

from ..base.errors import QhlInputError

__all__ = ["CRITERIA", "METHODS", "DesignSolution", "optimal_shares", "criterion_value", "equivalence_ratio",
           "efficient_rounding", "RIDGE"]

CRITERIA = ("D", "A", "worst")
METHODS = ("auto", "multiplicative", "slsqp")
RIDGE = 1e-12
AUTO_MULTIPLICATIVE_STEPS = 500
ACTIVE_SET_MIN = 60          # above this many candidates SLSQP runs on a growing support
ACTIVE_SET_ADD = 20
ACTIVE_SET_ROUNDS = 40
ACTIVE_SET_EQ_TOL = 1e-3
WARM_START_STEPS = 200


@dataclass(frozen=True)
class DesignSolution:
    """Optimal shares on the simplex.

    Attributes:
        shares: (K,) w_k, sum 1 (of the unit the matrices are given per: shots, or budget if F_k / c_k).
        criterion: 'D', 'A' or 'worst'; value: its value at `shares` (module docstring; no ridge).
        equivalence: max over candidates of the directional derivative over its optimum value (1 at the
            optimum; for 'worst' with the weights of its KKT multipliers, nan when they are not known).
        method: the algorithm used; iterations; converged.
        multipliers: 'worst' only: the weights mu over the parameters (sum 1) of its optimal multipliers.
    """

    shares: np.ndarray
    criterion: str
    value: float
    equivalence: float
    method: str
    iterations: int
    converged: bool
    multipliers: np.ndarray | None = None


def _check(fishers, selection):
    F = np.asarray(fishers, float)
    if F.ndim != 3 or F.shape[1] != F.shape[2] or F.shape[0] < 1:
        raise QhlInputError(f"expected Fisher matrices of shape (K, P, P), got {F.shape}", key="fishers")
    if not np.all(np.isfinite(F)):
        raise QhlInputError("Fisher matrices must be finite", key="fishers")
    F = 0.5 * (F + np.transpose(F, (0, 2, 1)))
    P = F.shape[1]
    sel = np.arange(P) if selection is None else np.asarray(selection, int)
    if sel.size == 0 or np.any(sel < 0) or np.any(sel >= P):
        raise QhlInputError(f"parameter selection {list(sel)} is out of range 0..{P - 1}", key="parameters")
    d = np.diag(F.sum(axis=0))
    ok = np.all(d > 0)
    if ok:
        ev = np.linalg.eigvalsh(F.sum(axis=0) / np.sqrt(np.outer(d, d)))
        ok = ev[0] > 1e-12 * ev[-1]
    if not ok:
        raise QhlInputError("the candidates together do not determine every parameter (their summed Fisher "
                            "matrix is singular): add candidates or fix parameters", key="candidates")
    return F, sel


def _inv(M):
    return np.linalg.inv(M)


def criterion_value(fishers, shares, criterion="D", selection=None) -> float:
    """The criterion (module docstring) of M(w) = sum_k w_k F_k; inf where M is singular."""
    F = np.asarray(fishers, float)
    M = np.einsum("k,kij->ij", np.asarray(shares, float), F)
    P = M.shape[0]
    sel = np.arange(P) if selection is None else np.asarray(selection, int)
    sign, logdet = np.linalg.slogdet(M)
    if sign <= 0:
        return float("inf")
    if criterion == "D":
        return float(-logdet)
    Minv = _inv(M)
    if criterion == "A":
        return float(np.trace(Minv[np.ix_(sel, sel)]))
    if criterion == "worst":
        return float(np.max(np.diag(Minv)[sel]))
    raise QhlInputError(f"unknown criterion {criterion!r}: expected one of {', '.join(CRITERIA)}", key="criterion")


def equivalence_ratio(fishers, shares, criterion="D", selection=None, weights=None) -> float:
    """max_k (directional derivative towards candidate k) / (its value at the optimum); 1 at the optimum.

    D: max_k tr(M^-1 F_k) / P; A: max_k tr(A^T M^-1 F_k M^-1 A) / tr(A^T M^-1 A) (module docstring),
    with `weights` a_i on the selected variances when given (sum_i a_i (M^-1 F_k M^-1)_ii over
    sum_i a_i (M^-1)_ii). 'worst' (not differentiable at a tie) has the A form with the weights of its
    optimal multipliers mu (the minimax design is A-optimal for the weights mu: a saddle point of
    sum_i mu_i (M^-1)_ii; Pukelsheim 1993, ch. 7); here without weights: nan.
    """
    F = np.asarray(fishers, float)
    M = np.einsum("k,kij->ij", np.asarray(shares, float), F)
    Minv = _inv(M)
    P = M.shape[0]
    sel = np.arange(P) if selection is None else np.asarray(selection, int)
    if criterion == "D":
        return float(np.max(np.einsum("ij,kji->k", Minv, F)) / P)
    if criterion == "A":
        a = np.ones(len(sel)) if weights is None else np.asarray(weights, float)
        B = Minv[:, sel] * np.sqrt(a)[None, :]
        return float(np.max(np.einsum("ia,kij,ja->k", B, F, B)) / np.sum(a * np.diag(Minv)[sel]))
    return float("nan")


def _scaled(F):
    """F rescaled by S = diag(M_equal)^-1/2; returns (F_scaled, S)."""
    m_eq = F.mean(axis=0)
    d = np.sqrt(np.maximum(np.diag(m_eq), 1e-300))
    S = 1.0 / d
    Fs = F * S[None, :, None] * S[None, None, :]
    return Fs, S


def _multiplicative(Fs, w, tol, max_iter, ridge):
    P = Fs.shape[1]
    it = 0
    for it in range(1, max_iter + 1):
        M = np.einsum("k,kij->ij", w, Fs) + ridge * np.eye(P)
        d = np.einsum("ij,kji->k", _inv(M), Fs)
        if np.max(d) <= P * (1 + tol):
            return w, it, True
        w = w * d / np.sum(w * d)
    return w, it, False


def _weighted_derivatives(Fs, w, a, ridge):
    """Weighted-A directional derivatives d_k = sum_i a_i (M^-1 F_k M^-1)_ii and sum_i a_i (M^-1)_ii."""
    Mi = _inv(np.einsum("k,kij->ij", w, Fs) + ridge * np.eye(Fs.shape[1]))
    B = Mi * np.sqrt(a)[None, :]
    return np.einsum("ia,kij,ja->k", B, Fs, B), float(np.sum(a * np.diag(Mi)))


def _d_derivatives(Fs, w, ridge):
    """D directional derivatives d_k = tr(M^-1 F_k) and P."""
    Mi = _inv(np.einsum("k,kij->ij", w, Fs) + ridge * np.eye(Fs.shape[1]))
    return np.einsum("ij,kji->k", Mi, Fs), float(Fs.shape[1])


def _slsqp(Fs, a, sel, criterion, w0, tol, max_iter, ridge):
    """SLSQP over the candidates of Fs; a: the variance weights of the parameters (scaled coordinates).

    Returns (w, iterations, success, mu) with mu the worst criterion's multipliers (weights over the
    parameters; None for D and A)."""
    from scipy.optimize import minimize
    K, P, _ = Fs.shape
    eye = np.eye(P)

    def mat(w):
        return np.einsum("k,kij->ij", w, Fs) + ridge * eye

    def minv(w):
        return _inv(mat(w))

    if criterion in ("D", "A"):
        norm = 1.0 if criterion == "D" else float(np.sum(a * np.diag(minv(np.full(K, 1.0 / K)))))

        def fun(w):
            M = mat(w)
            Mi = _inv(M)
            if criterion == "D":
                return -np.linalg.slogdet(M)[1], -np.einsum("ij,kji->k", Mi, Fs)
            B = Mi * np.sqrt(a)[None, :]
            return float(np.sum(a * np.diag(Mi))) / norm, -np.einsum("ia,kij,ja->k", B, Fs, B) / norm

        res = minimize(fun, w0, jac=True, method="SLSQP", bounds=[(0.0, 1.0)] * K,
                       constraints=[{"type": "eq", "fun": lambda w: np.sum(w) - 1.0,
                                     "jac": lambda w: np.ones_like(w)}],
                       options={"maxiter": max_iter, "ftol": tol * 1e-3})
        w = np.clip(res.x, 0.0, None)
        return w / w.sum(), int(res.nit), bool(res.success), None
    # worst: variables (w, s); minimise s subject to a_i (M^-1)_ii / scale <= s for chosen i.
    scale = float(np.max(a[sel] * np.diag(minv(w0))[sel]))

    def cons(x):
        return x[K] - a[sel] * np.diag(minv(x[:K]))[sel] / scale

    def cons_jac(x):
        rows = minv(x[:K])[sel, :]                            # (|sel|, P)
        dvar = -np.einsum("ai,kij,aj->ak", rows, Fs, rows)    # d (M^-1)_aa / d w_k
        return np.hstack([-(a[sel][:, None] * dvar) / scale, np.ones((len(sel), 1))])

    x0 = np.concatenate([w0, [1.0]])
    res = minimize(lambda x: (x[K], np.concatenate([np.zeros(K), [1.0]])), x0, jac=True, method="SLSQP",
                   bounds=[(0.0, 1.0)] * K + [(0.0, None)],
                   constraints=[{"type": "eq", "fun": lambda x: np.sum(x[:K]) - 1.0,
                                 "jac": lambda x: np.concatenate([np.ones(K), [0.0]])},
                                {"type": "ineq", "fun": cons, "jac": cons_jac}],
                   options={"maxiter": max_iter, "ftol": tol * 1e-3})
    w = np.clip(res.x[:K], 0.0, None)
    mu = np.zeros(P)
    m = np.asarray(getattr(res, "multipliers", np.zeros(1 + len(sel))), float)[1:1 + len(sel)]
    m = np.clip(m, 0.0, None)
    mu[sel] = m / m.sum() if m.sum() > 0 else 1.0 / len(sel)
    return w / w.sum(), int(res.nit), bool(res.success), mu


def _warm_start(Fs, a, w, steps, ridge):
    """A multiplicative step on the weighted-A derivatives, w_k <- w_k d_k^(1/2) (normalised): only a
    starting point for SLSQP (its end point is checked by the equivalence theorem, not trusted)."""
    for _ in range(steps):
        d, _ = _weighted_derivatives(Fs, w, a, ridge)
        w = w * np.sqrt(np.maximum(d, 0.0))
        w = w / w.sum()
    return w


def _active_set(Fs, a, sel, criterion, w_start, tol, max_iter, ridge):
    """SLSQP on a support that grows until the equivalence theorem holds over every candidate.

    SLSQP's cost grows as K^3: with more than ACTIVE_SET_MIN candidates it runs on the candidates
    with the largest starting shares; then candidates outside whose directional derivative exceeds
    the criterion's reference by more than ACTIVE_SET_EQ_TOL join (the ACTIVE_SET_ADD largest each
    round), until none does (a column-generation loop; common practice)."""
    K = Fs.shape[0]
    if K <= ACTIVE_SET_MIN:
        return _slsqp(Fs, a, sel, criterion, w_start, tol, max_iter, ridge)
    order = np.argsort(-w_start)
    support = set(order[:ACTIVE_SET_MIN].tolist())
    total_it, w, ok, mu = 0, w_start, False, None
    for _ in range(ACTIVE_SET_ROUNDS):
        idx = np.array(sorted(support))
        ws0 = np.maximum(w[idx], 1e-6)
        ws, it, ok, mu = _slsqp(Fs[idx], a, sel, criterion, ws0 / ws0.sum(), tol, max_iter, ridge)
        total_it += it
        w = np.zeros(K)
        w[idx] = ws
        if criterion == "D":
            d, ref = _d_derivatives(Fs, w, ridge)
        else:
            d, ref = _weighted_derivatives(Fs, w, a if mu is None else a * mu, ridge)
        out = np.array([k for k in np.argsort(-d) if k not in support and d[k] > ref * (1 + ACTIVE_SET_EQ_TOL)])
        if out.size == 0:
            return w, total_it, ok, mu
        support.update(out[:ACTIVE_SET_ADD].tolist())
    return w, total_it, False, mu


def optimal_shares(fishers, criterion: str = "D", selection=None, method: str = "auto", tol: float = 1e-6,
                   max_iter: int = 20000, start=None) -> DesignSolution:
    """Shares w on the simplex that minimise the criterion of M(w) = sum_k w_k F_k (module docstring).

    Args:
        fishers: (K, P, P) Fisher matrices per shot (or per unit cost), any units.
        criterion: 'D', 'A' or 'worst'.
        selection: indices of the parameters the A and worst criteria look at (default all).
        method: 'multiplicative' (D only), 'slsqp', or 'auto' (D: AUTO_MULTIPLICATIVE_STEPS multiplicative
            steps, then SLSQP from there when the equivalence theorem does not yet hold to `tol`; A and
            worst: SLSQP). The multiplicative algorithm slows down when candidates carry nearly equal
            information (neighbouring time points): SLSQP finishes those. With more than ACTIVE_SET_MIN
            candidates SLSQP runs on a growing support (`_active_set`).
        tol: D multiplicative: stop when max_k d_k <= P (1 + tol); SLSQP: ftol = tol / 1000 (relative criterion).
        start: initial shares (default equal).

    Returns:
        DesignSolution.

    Raises:
        QhlInputError: wrong shapes, unknown criterion or method, a singular summed Fisher matrix.

    Example:
        >>> x = np.array([-1.0, 0.0, 1.0])
        >>> F = np.array([np.outer([1, v, v * v], [1, v, v * v]) for v in x])
        >>> np.round(optimal_shares(F, "D").shares, 4)
        array([0.3333, 0.3333, 0.3333])
    """
    if criterion not in CRITERIA:
        raise QhlInputError(f"unknown criterion {criterion!r}: expected one of {', '.join(CRITERIA)}",
                            key="criterion")
    if method not in METHODS:
        raise QhlInputError(f"unknown method {method!r}: expected one of {', '.join(METHODS)}", key="method")
    if method == "multiplicative" and criterion != "D":
        raise QhlInputError("the multiplicative algorithm is for the D criterion: use method 'slsqp'", key="method")
    F, sel = _check(fishers, selection)
    K, P, _ = F.shape
    Fs, S = _scaled(F)
    a = np.zeros(P)
    a[sel] = S[sel] ** 2              # (M^-1)_ii = S_i^2 (Ms^-1)_ii: variances of the original parameters
    ridge = RIDGE * float(np.max(np.linalg.eigvalsh(Fs.sum(axis=0))))
    w0 = np.full(K, 1.0 / K) if start is None else np.asarray(start, float) / np.sum(start)
    mu = None
    slsqp_iter = min(max_iter, 1000)
    if method == "auto" and criterion == "D":
        w, it, ok = _multiplicative(Fs, w0, tol, min(max_iter, AUTO_MULTIPLICATIVE_STEPS), ridge)
        method = "multiplicative"
        if not ok:
            w2, it2, ok, _ = _active_set(Fs, a, sel, criterion, w, tol, slsqp_iter, ridge)
            if criterion_value(F, w2, criterion, sel) <= criterion_value(F, w, criterion, sel):
                w = w2
            it, method = it + it2, "multiplicative+slsqp"
    elif method == "multiplicative":
        w, it, ok = _multiplicative(Fs, w0, tol, max_iter, ridge)
    else:
        if method == "auto" and K > ACTIVE_SET_MIN:
            w0 = _warm_start(Fs, a, w0, WARM_START_STEPS, ridge)
        w, it, ok, mu = _active_set(Fs, a, sel, criterion, w0, tol, slsqp_iter, ridge)
        method = "slsqp"
    if criterion == "worst":
        weights = np.zeros(P) if mu is None else mu
        equivalence = equivalence_ratio(F, w, "A", np.flatnonzero(weights > 0), weights[weights > 0])
    else:
        equivalence = equivalence_ratio(F, w, criterion, sel)
    return DesignSolution(w, criterion, criterion_value(F, w, criterion, sel), equivalence, method, it, ok,
                          mu if criterion == "worst" else None)


def efficient_rounding(shares, n: int) -> np.ndarray:
    """Integer counts summing to n from shares (efficient rounding: Pukelsheim and Rieder, Biometrika
    79, 763 (1992)): on the l candidates with w_k > 0, start from ceil((n - l/2) w_k), then
    raise the count with the smallest n_k / w_k or lower the one with the largest (n_k - 1) / w_k
    until the total is n."""
    w = np.asarray(shares, float)
    n = int(n)
    out = np.zeros(w.shape, int)
    live = np.flatnonzero(w > 0)
    if n <= 0 or live.size == 0:
        return out
    wl = w[live] / w[live].sum()
    k = np.ceil((n - live.size / 2.0) * wl).astype(int)
    k = np.maximum(k, 0)
    while k.sum() < n:
        j = int(np.argmin(k / wl))
        k[j] += 1
    while k.sum() > n:
        ratio = np.where(k > 0, (k - 1) / wl, -np.inf)
        j = int(np.argmax(ratio))
        k[j] -= 1
    out[live] = k
    return out
