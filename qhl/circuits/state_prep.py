"""Input states whose weighted mixture is the deviation density rho0 = sum_i Ix_i.

rho0 is traceless, not a state. It is written exactly as a signed mixture of product states,
    rho0 / N = sum_k p_k w_k |psi_k><psi_k|,   N = Tr[O rho0] = N_obs 2^n / 4,
so that for any circuit U and observable A,  Tr[A U rho0 U^dag] / N = E_k[ w_k <psi_k|U^dag A U|psi_k> ]
with k drawn from p. With O = sum_j I+_j = sum_j (X_j + i Y_j)/2 this makes the signal
S(t) = Tr[O rho(t)] / Tr[O rho0] an exact expectation: Re S from A = sum_j X_j / 2, Im S from
A = sum_j Y_j / 2 (observed spins j).

Schemes (p uniform over the listed choices; derivation: E_sigma[sigma |sigma><sigma|] = X/2 for
sigma = +-1 labelling |+>, |->, and E_b |b><b| = I/2 for b in {0, 1}; common practice):
    'product'  every observed spin in |+> or |->, every other spin in |0> or |1>;
               w = (2 / N_obs) sum_i sigma_i.
    'marked'   one observed spin i (uniform) in |+> or |->, every other spin in |0> or |1>;
               w = 2 sigma_i.
Estimator and variance: one shot of A gives a value in [-N_obs/2, N_obs/2] and |w| <= 2, so a
single-shot estimate w a of Re S (or Im S) lies in [-N_obs, N_obs] and has variance at most
N_obs^2 (Popoviciu's inequality, common practice). At t = 0 the 'product' scheme gives
Re S = (sum sigma)^2 / N_obs exactly in every shot, variance 2 - 2/N_obs; 'marked' gives
variance N_obs - 1; so 'product' is the default. Purification (one partner qubit per spin in a
Bell pair) is the ancilla-heavy alternative and is not built here.

States are prepared by one ry(theta) per qubit on |0>: theta = pi/2 -> |+>, -pi/2 -> |->,
0 -> |0>, pi -> |1>, so the input is a circuit parameter bound per shot.
"""

from dataclasses import dataclass

import numpy as np

from ..base.errors import QhlInputError
from ..base.memory import require_memory

__all__ = ["InputEnsemble", "input_ensemble", "SCHEMES", "MAX_ENUMERATED_QUBITS"]

SCHEMES = ("product", "marked")
MAX_ENUMERATED_QUBITS = 16
_PLUS, _MINUS, _ZERO, _ONE = np.pi / 2, -np.pi / 2, 0.0, np.pi


@dataclass(frozen=True)
class InputEnsemble:
    """A signed product-state decomposition of rho0 / Tr[O rho0] (see the module docstring).

    Attributes:
        scheme: 'product' or 'marked'.
        observed: per qubit, True for observed spins.
    """

    scheme: str
    observed: tuple

    @property
    def n_qubits(self) -> int:
        return len(self.observed)

    @property
    def n_observed(self) -> int:
        return int(sum(self.observed))

    @property
    def max_weight(self) -> float:
        """max |w_k| (2 for both schemes)."""
        return 2.0

    def enumerate(self):
        """Every input with its exact weight p_k w_k (zero-weight inputs dropped).

        Returns:
            (angles (K, n) of the ry gates, weights (K,)); sum_k weights_k <psi_k|M|psi_k>
            = Tr[M rho0] / Tr[O rho0] for every operator M.

        Raises:
            QhlInputError: more than MAX_ENUMERATED_QUBITS qubits (use `sample`).
        """
        n = self.n_qubits
        if n > MAX_ENUMERATED_QUBITS:
            raise QhlInputError(f"{n} qubits: enumerating inputs needs n <= {MAX_ENUMERATED_QUBITS}; "
                                "sample them instead", key="inputs")
        obs = np.array(self.observed)
        bits = (np.arange(2 ** n)[:, None] >> np.arange(n)[None, :]) & 1   # (2^n, n)
        if self.scheme == "product":
            sigma = 1 - 2 * bits
            angles = np.where(obs[None, :], np.where(bits == 0, _PLUS, _MINUS), np.where(bits == 0, _ZERO, _ONE))
            w = 2.0 / self.n_observed * (sigma * obs[None, :]).sum(axis=1)
            p = 2.0 ** -n
        else:
            rows, ws = [], []
            for i in np.flatnonzero(obs):
                a = np.where(bits == 0, _ZERO, _ONE)
                a[:, i] = np.where(bits[:, i] == 0, _PLUS, _MINUS)
                rows.append(a)
                ws.append(2.0 * (1 - 2 * bits[:, i]))
            angles, w = np.concatenate(rows), np.concatenate(ws)
            p = 1.0 / (self.n_observed * 2 ** n)
        keep = w != 0
        return angles[keep].astype(float), (p * w[keep]).astype(float)

    def sample(self, rng, size: int):
        """`size` inputs drawn from p with their weights w (unbiased: E[w <A>] = Tr[A rho0]/N).

        Returns:
            (angles (size, n), weights (size,)).
        """
        n = self.n_qubits
        obs = np.array(self.observed)
        bits = rng.integers(0, 2, size=(size, n))
        angles = np.where(bits == 0, _ZERO, _ONE).astype(float)
        if self.scheme == "product":
            angles[:, obs] = np.where(bits[:, obs] == 0, _PLUS, _MINUS)
            w = 2.0 / self.n_observed * (1 - 2 * bits[:, obs]).sum(axis=1)
        else:
            marked = rng.choice(np.flatnonzero(obs), size=size)
            rows = np.arange(size)
            sigma = 1 - 2 * bits[rows, marked]
            angles[rows, marked] = np.where(sigma > 0, _PLUS, _MINUS)
            w = 2.0 * sigma
        return angles, w.astype(float)

    def operator(self) -> np.ndarray:
        """sum_k p_k w_k |psi_k><psi_k| as a dense matrix (equals rho0 / N; for checks)."""
        n = self.n_qubits
        require_memory("the dense input operator", 16.0 * 4 ** n)
        angles, weights = self.enumerate()
        out = np.zeros((2 ** n, 2 ** n), complex)
        for a, w in zip(angles, weights):
            # ry(theta)|0> = cos(theta/2)|0> + sin(theta/2)|1>; qubit q is bit q (kron high to low)
            single = [np.array([np.cos(t / 2), np.sin(t / 2)], complex) for t in a]
            psi = single[n - 1]
            for q in range(n - 2, -1, -1):
                psi = np.kron(psi, single[q])
            out += w * np.outer(psi, psi.conj())
        return out


def input_ensemble(model, scheme: str = "product") -> InputEnsemble:
    """The input ensemble for `model`'s observed spins.

    Raises:
        QhlInputError: unknown scheme or no observed spin.
    """
    if scheme not in SCHEMES:
        raise QhlInputError(f"unknown input scheme '{scheme}': expected one of {', '.join(SCHEMES)}",
                            key="scheme")
    observed = tuple(bool(o) for o in model.observed)
    if not any(observed):
        raise QhlInputError("no observed spin: rho0 = sum Ix is zero", key="observe")
    return InputEnsemble(scheme, observed)
