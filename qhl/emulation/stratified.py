"""Exact per-shot variance of the stratified estimator (fixed shots per insertion row).

Stratified sampling (qhl.circuits.circuit_family, `sample(..., sampling='stratified')`): row j
gets n_j of the N shots; a shot of row j draws the input k from p_k and returns
y = w_k a (a: the observable's eigenvalue on the measured bits), scaled by w_j N / n_j. With
    mu_j      = E[y | j]   = Tr[O   U_j rho_1 U_j^dag]
    m2_j      = E[y^2 | j] = Tr[O^2 U_j rho_2 U_j^dag]
    sigma_j^2 = m2_j - mu_j^2
(rho_m = sum_k p_k w_k^m |psi_k><psi_k| (x) |0><0|_anc, as in qhl.emulation.variance), the
estimate sum_j w_j ybar_j has
    Var = sum_j w_j^2 sigma_j^2 / n_j          (Cochran, "Sampling Techniques", 3rd ed. (1977),
                                                ch. 5, stratified random sampling; from memory)
and the effective per-shot variance N Var. With n_j = N |w_j| / W (proportional allocation) it
is W sum_j |w_j| sigma_j^2 = E[x^2] - W sum_j |w_j| mu_j^2, against E[x^2] - X^2 for rows drawn
i.i.d. (qhl.emulation.variance.family_moments): stratification removes the between-row term
W sum_j |w_j| mu_j^2 - X^2 >= 0 (Cauchy-Schwarz). Small clusters only (variance.MAX_QUBITS).
"""

from dataclasses import dataclass

import numpy as np

from ..base.blas import single_thread_blas
from ..base.errors import QhlInputError
from ..base.memory import require_memory
from ..circuits.circuit_family import stratified_counts
from .variance import check_exact_family, input_moment_operator, row_unitaries

__all__ = ["RowMoments", "row_moments", "stratified_shot_variance"]


@dataclass(frozen=True)
class RowMoments:
    """Per-row mean and second moment of y = w_k a (insertion rows in table order).

    Attributes:
        part: 're' or 'im'; weights: w_j; mean: mu_j; second: m2_j (0 for rows with w_j = 0).
    """

    part: str
    weights: np.ndarray
    mean: np.ndarray
    second: np.ndarray

    @property
    def variance(self) -> np.ndarray:
        return np.maximum(0.0, self.second - self.mean ** 2)

    @property
    def value(self) -> float:
        """X = sum_j w_j mu_j (the family's Re or Im part)."""
        return float(np.dot(self.weights, self.mean))


def row_moments(family, part: str = "re") -> RowMoments:
    """mu_j and m2_j of every insertion row (module docstring).

    Raises:
        QhlInputError: unknown part, more than variance.MAX_QUBITS qubits.
    """
    nq = check_exact_family(family, part, "exact stratified variance")
    require_memory("exact stratified variance", 16.0 * 4 ** nq * 4)
    n_anc = nq - family.inputs.n_qubits
    start = np.zeros((2 ** n_anc, 2 ** n_anc))
    start[0, 0] = 1.0
    rho1, rho2 = (np.kron(start, input_moment_operator(family.inputs, m)) for m in (1, 2))
    obs = np.real(np.diag(family.observable.to_matrix()))
    w = np.asarray(family.insertions.weights, float)
    mean, second = np.zeros(len(w)), np.zeros(len(w))
    with single_thread_blas(2 ** nq):
        for j, _, u in row_unitaries(family, part):
            mean[j] = float(np.sum(obs * np.real(np.sum((u @ rho1) * u.conj(), axis=1))))
            second[j] = float(np.sum(obs ** 2 * np.real(np.sum((u @ rho2) * u.conj(), axis=1))))
    return RowMoments(part, w, mean, second)


def stratified_shot_variance(family, shots: int, part: str = "re", moments: RowMoments | None = None) -> float:
    """N sum_j w_j^2 sigma_j^2 / n_j for the allocation n_j = stratified_counts(w, N).

    Raises:
        QhlInputError: fewer than 2 shots per nonzero row (the sampler falls back to i.i.d. rows).
    """
    mo = moments or row_moments(family, part)
    counts = stratified_counts(mo.weights, shots)
    if counts is None:
        raise QhlInputError(f"{shots} shots: stratified sampling needs 2 per insertion row", key="shots")
    live = counts > 0
    return float(shots * np.sum(mo.weights[live] ** 2 * mo.variance[live] / counts[live]))
