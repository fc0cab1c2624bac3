"""Near-term (shot-based) budgets of one cluster as functions of the evolution time t.

Everything here returns *variances* V(t) (or sums of them) in units of (per unit_hz)^2, so a
shot count is V / eps^2 for any precision eps: a sweep over eps costs nothing extra, and the
exact engine's eigendecomposition (cached per coefficient vector) serves all times at once.

Tiers: ranges and bounds (R^2) come from the model's Pauli coefficients alone, at any size. The
"exact" variances R^2 - mu^2 need the means mu from an engine with `gradient`/`hessian` like
qhl.exact.engine.ExactEngine; without one (`engine=None`, large clusters) they are None. A
pure-state (typicality) engine with the same methods can be passed in; `method` then says
'estimated' instead of 'exact'.

Hessian ranges factorise, R_H[x, m, n] = K t^2 a_xm a_xn with a_x = ||c||_1 s_x (qhl.costing.shots),
so the largest entry sits at m = n = argmax |a_x| and sum_{m <= n} R_H^2 = K^2 t^4
((sum a^2)^2 + sum a^4) / 2: no P x P array is built (P grows as n^2).

Strata of the full negative-log-likelihood gradient: (experiment x, time point j, Re|Im). Each
experiment's time grid is rescaled to end at t (its number of points kept). With residuals at
the optimum of the size of the noise, |r| ~ sigma_x, the NLL gradient sum Re[conj(r) dS]/sigma^2
weighs stratum k by 1/sigma_x; the weights are normalised to sum to 1, so the full gradient is a
weighted mean of components and eps means the same as for one component. Pauli terms inside a
stratum are sampled by |c_k| (the optimal allocation for worst-case variances, where each
term's spread is proportional to |c_k|).
"""

from dataclasses import dataclass

import numpy as np

from .shots import gradient_shot_range, hessian_shot_range, two_valued_variance

__all__ = ["NearTermModel", "near_term_model", "total_delay_s", "sequence_gradient_range"]


@dataclass
class NearTermModel:
    """Per-parameter ranges and the exact engine for one cluster's free parameters.

    Attributes:
        engine: qhl.exact.engine.ExactEngine, another engine with the same gradient/hessian, or None.
        experiments: the cluster's experiments.
        names: free parameter names (P).
        l1: ||c||_1 of each free generator (P,).
        scales: (X, P) scale factor of each free parameter in each experiment.
        kappa: observable factor (number of observed spins).
        unit_hz: frequency unit of the derivatives.
        weights: (X,) per-stratum weight of experiment x before normalisation (1/sigma_x).
    """

    engine: object
    experiments: list
    names: list
    l1: np.ndarray
    scales: np.ndarray
    kappa: float
    unit_hz: float
    weights: np.ndarray
    method: str = "exact"

    @property
    def has_means(self) -> bool:
        """True when an engine gives the means mu (the R^2 - mu^2 variances)."""
        return self.engine is not None

    # ------------------------------------------------------------------ ranges
    def hessian_ranges(self, t):
        """R[x, m, n] of d2S/dh_m dh_n at one time t."""
        s = self.scales
        return hessian_shot_range(t, self.l1[None, :, None], self.l1[None, None, :], s[:, :, None], s[:, None, :],
                                  self.kappa, self.unit_hz)

    def strata_times(self, t):
        """{x index: (T_sweep, J) times} each experiment's grid rescaled to end at t (array)."""
        t = np.atleast_1d(np.asarray(t, float))
        return [np.outer(t / ex.t_max_s, ex.times_s) for ex in self.experiments]

    def normalised_weights(self):
        """w_x per stratum with sum over all strata (x, j, part) equal to 1."""
        counts = np.array([2 * ex.points for ex in self.experiments], float)
        return self.weights / float(np.sum(self.weights * counts))

    # ------------------------------------------------------------------ variances
    def worst_range_index(self):
        """(x, n) of the component with the largest single-shot range (first on ties)."""
        x, n = np.unravel_index(np.argmax(self.l1[None, :] * np.abs(self.scales)), self.scales.shape)
        return int(x), int(n)

    def component_variances(self, t):
        """The component with the largest range (real part): (bound R^2, exact R^2 - mu^2 or None) over t."""
        t = np.atleast_1d(np.asarray(t, float))
        x, n = self.worst_range_index()
        r = gradient_shot_range(t, self.l1[n], self.scales[x, n], self.kappa, self.unit_hz)
        if not self.has_means:
            return r**2, None
        _, g = self.engine.gradient(self.experiments[x], times=t, parameters=[self.names[n]])
        return r**2, two_valued_variance(r, g[0].real * self.unit_hz)

    def per_parameter_component(self, t):
        """(bound (P,), exact (P,) or None) worst over experiments and Re/Im, at one time t."""
        bound = np.zeros(len(self.names))
        exact = np.zeros(len(self.names)) if self.has_means else None
        for x, ex in enumerate(self.experiments):
            r = gradient_shot_range(t, self.l1, self.scales[x], self.kappa, self.unit_hz)
            bound = np.maximum(bound, r**2)
            if not self.has_means:
                continue
            _, g = self.engine.gradient(ex, times=[t])
            mu = g[:, 0] * self.unit_hz
            exact = np.maximum(exact, np.maximum(two_valued_variance(r, mu.real), two_valued_variance(r, mu.imag)))
        return bound, exact

    def worst_hessian_index(self):
        """(x, m, n) of the Hessian entry with the largest range (first on ties): m = n = argmax |a_x|."""
        a = np.abs(self.l1[None, :] * self.scales)
        x, m = np.unravel_index(np.argmax(a), a.shape)
        return int(x), int(m), int(m)

    def _hessian_range(self, t, x, m, n):
        s = self.scales
        return hessian_shot_range(t, self.l1[m], self.l1[n], s[x, m], s[x, n], self.kappa, self.unit_hz)

    def hessian_entry_variances(self, t, exact=True):
        """The Hessian entry with the largest range at one time t (first on ties), real part:
        (bound R^2, exact R^2 - mu^2 or None; None also without an engine)."""
        x, m, n = self.worst_hessian_index()
        rh = float(self._hessian_range(t, x, m, n))
        bound = rh**2
        if not exact or not self.has_means:
            return bound, None
        mu = self.worst_hessian_mean(t).real
        return bound, float(two_valued_variance(rh, mu))

    def worst_hessian_mean(self, t):
        """d2S/dh_m dh_n (complex, per unit_hz^2) of the worst-range entry at t from the engine
        (cached per t), or None."""
        if not self.has_means:
            return None
        cache = self.__dict__.setdefault("_hessian_means", {})
        if float(t) not in cache:
            x, m, n = self.worst_hessian_index()
            _, _, h = self.engine.hessian(self.experiments[x], times=[t], parameters=[self.names[m], self.names[n]])
            cache[float(t)] = complex(h[0, 1, 0]) * self.unit_hz**2
        return cache[float(t)]

    def hessian_bound_over_t(self, t):
        t = np.atleast_1d(np.asarray(t, float))
        x, m, n = self.worst_hessian_index()
        return float(self._hessian_range(1.0, x, m, n)) ** 2 * t**4

    def _hessian_square_sums(self):
        """(X,) sum over m <= n of R_H[x, m, n]^2 at t = 1 (factorised, see the module docstring)."""
        out = np.zeros(len(self.experiments))
        for x in range(len(self.experiments)):
            idx = np.arange(len(self.names))
            d = np.abs(self._hessian_range(1.0, x, idx, idx))    # R_H[x,m,n]^2 = R_H[x,m,m] R_H[x,n,n]
            out[x] = 0.5 * (np.sum(d) ** 2 + np.sum(d**2))
        return out

    def gradient_strata(self, t):
        """Per-parameter stratified sums over (x, j, part) at each sweep time.

        Returns:
            dict of (T, P) arrays: 'opt_bound' (sum w sigma)^2, 'opt_exact', 'uni_bound'
            K sum w^2 sigma^2, 'uni_exact'; 'fisher_bound' / 'fisher_exact' sum of variances over
            all strata (every component to eps, for the Fisher matrix); 'hessian_bound' per
            entry pair sum (T,) of R_H^2 over strata and entries m <= n; 'range_sum' sum w R (T, P)
            and 'strata' K.
        """
        t = np.atleast_1d(np.asarray(t, float))
        w = self.normalised_weights()
        P = len(self.names)
        out = {k: np.zeros((t.size, P)) for k in ("opt_bound", "opt_exact", "uni_bound", "uni_exact",
                                                  "fisher_bound", "fisher_exact", "range_sum")}
        sum_w_sig_b = np.zeros((t.size, P))
        sum_w_sig_e = np.zeros((t.size, P))
        sum_w2_var_b = np.zeros((t.size, P))
        sum_w2_var_e = np.zeros((t.size, P))
        hess = np.zeros(t.size)
        rh1_sq = self._hessian_square_sums()
        strata = 0
        exact = self.has_means
        for x, (ex, tt) in enumerate(zip(self.experiments, self.strata_times(t))):
            strata += 2 * ex.points
            r = gradient_shot_range(tt[None], self.l1[:, None, None], self.scales[x][:, None, None],
                                    self.kappa, self.unit_hz)          # (P, T, J)
            if exact:
                _, g = self.engine.gradient(ex, times=tt.ravel())
                mu = (g * self.unit_hz).reshape(P, *tt.shape)          # (P, T, J)
                parts = (mu.real, mu.imag)
            else:
                parts = (None, None)
            for part in parts:
                vb = r**2
                ve = two_valued_variance(r, part) if exact else vb
                sum_w_sig_b += w[x] * np.sum(np.sqrt(vb), axis=2).T
                sum_w_sig_e += w[x] * np.sum(np.sqrt(ve), axis=2).T
                sum_w2_var_b += w[x] ** 2 * np.sum(vb, axis=2).T
                sum_w2_var_e += w[x] ** 2 * np.sum(ve, axis=2).T
                out["fisher_bound"] += np.sum(vb, axis=2).T
                out["fisher_exact"] += np.sum(ve, axis=2).T
            out["range_sum"] += 2 * w[x] * np.sum(r, axis=2).T
            hess += 2 * float(rh1_sq[x]) * np.sum(tt**4, axis=1)
        out["opt_bound"], out["opt_exact"] = sum_w_sig_b**2, sum_w_sig_e**2
        out["uni_bound"], out["uni_exact"] = strata * sum_w2_var_b, strata * sum_w2_var_e
        if not exact:
            for k in ("opt_exact", "uni_exact", "fisher_exact"):
                out[k] = None
        out["hessian_bound"] = hess
        out["strata"] = strata
        return out


def near_term_model(engine, experiments, unit_hz=1e3, model=None, method="exact") -> NearTermModel:
    """Collect ranges and weights for the model's free parameters (see NearTermModel).

    Args:
        engine: an engine with gradient/hessian (its `.model` is used), or None with `model` given.
        model: the HamiltonianModel when engine is None: ranges from its Pauli coefficients alone.
        method: 'exact' or 'estimated', the tier of the engine's means.
    """
    model = engine.model if model is None else model
    free = list(model.free)
    l1 = np.array([float(np.sum(np.abs(model.parameter(n).generator.coeffs))) for n in free])
    scales = np.array([model.scale_factors(ex)[model.free_indices] for ex in experiments])
    kappa = float(sum(model.observed))
    sig = np.array([ex.noise if ex.noise else 1.0 for ex in experiments], float)
    return NearTermModel(engine, list(experiments), free, l1, scales, kappa, unit_hz, 1.0 / sig,
                         method if engine is not None else "bound")


# ---------------------------------------------------------------- pulse-sequence experiments
def total_delay_s(experiment) -> float:
    """Sum of the delays of an experiment's pulse sequence in seconds (repeats unrolled; 0 for a free evolution)."""
    from ..spins.cluster import flat_steps
    return float(sum(st.seconds for st in flat_steps(getattr(experiment, "steps", ()) or ()) if hasattr(st, "seconds")))


def sequence_gradient_range(t, experiment, coefficient_l1, scale, kappa, unit_hz=1e3):
    """Single-shot range R of dS/dh_n (per unit_hz) of a pulse-sequence experiment at acquisition time t.

    Derivation (the Hadamard-test family of qhl.circuits.sequence_circuits.sequence_gradient_circuit).
    Pulses carry no parameter, so the insertion points run over every Trotterised segment (each delay
    tau_d and the acquisition t); point a = (segment, slot s, Pauli k) has beta_a = tau_s 2 pi s_n g_{n,k}
    and the family's weight 2 beta_a. In every step of a product formula of order 1 or 2 each term acts
    for a total of the step's length (the two halves of order 2 add up to it), so summed over a segment
    the slot lengths give the segment's length and
        sum_a |beta_a| = 2 pi |s_n| ||g_n||_1 (t + sum_d tau_d) =: W.
    One shot draws a row with probability |beta_a| / W and returns the sign times 2 W times one
    read-out of the signal observable, which lies in [-N_obs, N_obs] (qhl.circuits.state_prep), so
        |x| <= R = 2 W N_obs = 2 (t + T_delays) ||g_n||_1 2 pi |s_n| N_obs,
    the free-evolution formula (qhl.costing.shots.gradient_shot_range, Banchi and Crooks, Quantum 5,
    386 (2021)) with t replaced by the whole Trotterised time t + T_delays. For an experiment without
    steps T_delays = 0 and R is the FID range.
    """
    total = np.asarray(t, float) + total_delay_s(experiment)
    return gradient_shot_range(total, coefficient_l1, scale, kappa, unit_hz)
