"""Phase and sinc tables of the first divided difference (qhl.exact.divided_differences.phase_sinc_tables).

Reference: the divided difference f[x, y] = (f(x) - f(y)) / (x - y) of f(E) = exp(-i E tau) (f[x, x] = f'(x))
evaluated in 40-digit arithmetic with mpmath (a general-purpose library), on the float inputs.
"""

import mpmath
import numpy as np

from qhl.exact.divided_differences import phase_sinc_tables


def _reference(x, y, tau):
    with mpmath.workdps(40):
        x, y, tau = mpmath.mpf(x), mpmath.mpf(y), mpmath.mpf(tau)
        f = lambda z: mpmath.exp(-1j * z * tau)  # noqa: E731
        dd = -1j * tau * f(x) if x == y else (f(x) - f(y)) / (x - y)
        return complex(mpmath.exp(1j * y * tau) * dd), complex(mpmath.exp(1j * x * tau) * dd)


def test_tables_give_the_phased_divided_differences_to_rounding():
    rng = np.random.default_rng(7)
    e = np.sort(rng.normal(0.0, 4e4, (4, 7)), axis=1)
    e[0, 3] = e[0, 2] + 1e-3            # |u| ~ 1e-9: the series branch
    e[1, 5] = e[1, 4]                   # a degenerate pair
    e[2, 1] = e[2, 0] + 0.4 / 2.5e-6    # |u| = 0.2 (the branch point) at tau = 2.5e-6
    e[3, 6] = e[3, 5] + 0.39 / 1e-5     # |u| just below 0.2
    tau = np.array([3e-6, 1e-5, 2.5e-6, 1e-5])
    p, s = phase_sinc_tables(e, tau)
    assert p.shape == s.shape == (4, 7, 7)
    g_b = -1j * tau[:, None, None] * p * s           # exp(i e_b tau) f[e_a, e_b]
    g_a = -1j * tau[:, None, None] * p.conj() * s    # exp(i e_a tau) f[e_a, e_b]
    worst = 0.0
    for m in range(4):
        for a in range(7):
            for b in range(7):
                rb, ra = _reference(e[m, a], e[m, b], tau[m])
                worst = max(worst, abs(g_b[m, a, b] - rb) / tau[m], abs(g_a[m, a, b] - ra) / tau[m])
    assert worst < 3e-15


def test_scalar_tau_and_the_diagonal():
    e = np.array([[-2.0e4, 0.0, 3.5e4]])
    p, s = phase_sinc_tables(e, 2e-5)
    # diagonal: u = 0, so P = 1 (to rounding) and sin(u)/u = 1 exactly (f[x, x] = -i tau f(x))
    assert np.abs(np.diagonal(p[0]) - 1).max() < 3e-16
    assert np.array_equal(np.diagonal(s[0]), np.ones(3))
    # off the diagonal: sin(u)/u with u = (e_a - e_b) tau / 2 (numpy's sinc as the outside value)
    u = (e[0][:, None] - e[0][None, :]) * 2e-5 / 2
    assert np.allclose(s[0], np.sinc(u / np.pi), rtol=0, atol=3e-16)
    assert np.allclose(p[0], np.exp(-1j * u), rtol=0, atol=3e-16)
