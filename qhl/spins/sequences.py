"""Named published pulse sequences as ready-made blocks of ideal pulses and delays.

Each takes one spacing `tau_s` (seconds) and acts on one isotope (None: the observed one).
Phases follow qhl.spins.cluster.Pulse: 0 degrees rotates about +x, 90 about +y; the implicit
excitation leaves rho0 = sum Ix, so "along the magnetisation" means phase 0.

    hahn-echo    tau - 180(0) - tau                      (E. L. Hahn, Phys. Rev. 80, 580 (1950))
        refocuses offsets (the shift average is zero at the end of the block); the homonuclear
        dipolar and J terms are invariant under the 180-degree pulse and are not refocused.
    solid-echo   tau - 90(0) - tau                       (J. G. Powles and P. Mansfield,
        Phys. Lett. 2, 58 (1962)). The 90-degree pulse about the magnetisation turns the
        secular dipolar term D_z = 2 IzSz - IxSx - IySy into D_y, so its average over the block
        is (D_z + D_y) / 2 = -D_x / 2: the dipolar term scaled by -1/2 about x, which commutes
        with sum Ix, so an isolated like pair refocuses exactly at the end of the block.
    wahuha       tau - 90(0) - tau - 90(270) - 2 tau - 90(90) - tau - 90(180) - tau, cycle 6 tau
        (J. S. Waugh, L. M. Huber and U. Haeberlen, Phys. Rev. Lett. 20, 180 (1968)): the
        toggling frame puts the z axis along z, y and x for 2 tau each, so the zeroth-order
        average dipolar term (D_x + D_y + D_z) / 3 vanishes and the offset term becomes
        Omega (Ix + Iy + Iz) / 3 up to signs: a rotation at Omega / sqrt(3), the chemical
        shift scaled by 1/sqrt(3). The net pulse rotation over a cycle is the identity.
    mlev-4       tau - 180(0) - 2 tau - 180(0) - 2 tau - 180(180) - 2 tau - 180(180) - tau, cycle 8 tau:
        the MLEV-4 phase cycle R R Rbar Rbar (M. H. Levitt, R. Freeman and T. Frenkiel, J. Magn.
        Reson. 47, 328 (1982)) of ideal, windowed 180-degree pulses. Applied to another isotope
        (isotope = "13C" while observing 1H) it is a heteronuclear decoupling train: each pulse
        flips Sz, so Sz and every 2 Iz Sz term change sign from window to window and average to
        zero over the cycle (toggling frame), while the observed spins' offsets and their
        homonuclear couplings are untouched. For terms that commute (an isolated I-S pair) the
        average is exact; the net rotation over a cycle is the identity.
The scaling factors are checked numerically in tests/test_sequences_named.py.
"""

from ..base.errors import QhlInputError
from .cluster import Block, Delay, Pulse

__all__ = ["NAMED_SEQUENCES", "named_block", "CYCLE_TAUS"]


def _hahn(tau, iso):
    return (Delay(tau), Pulse(180.0, 0.0, iso), Delay(tau))


def _solid(tau, iso):
    return (Delay(tau), Pulse(90.0, 0.0, iso), Delay(tau))


def _wahuha(tau, iso):
    return (Delay(tau), Pulse(90.0, 0.0, iso), Delay(tau), Pulse(90.0, 270.0, iso), Delay(2 * tau),
            Pulse(90.0, 90.0, iso), Delay(tau), Pulse(90.0, 180.0, iso), Delay(tau))


def _mlev4(tau, iso):
    return (Delay(tau), Pulse(180.0, 0.0, iso), Delay(2 * tau), Pulse(180.0, 0.0, iso), Delay(2 * tau),
            Pulse(180.0, 180.0, iso), Delay(2 * tau), Pulse(180.0, 180.0, iso), Delay(tau))


NAMED_SEQUENCES = {"hahn-echo": _hahn, "solid-echo": _solid, "wahuha": _wahuha, "mlev-4": _mlev4}
CYCLE_TAUS = {"hahn-echo": 2, "solid-echo": 2, "wahuha": 6, "mlev-4": 8}   # block length in units of tau_s


def named_block(name, tau_s: float, repeat: int = 1, isotope=None) -> Block:
    """The named sequence `name` with spacing `tau_s` as a Block repeated `repeat` times.

    Raises:
        QhlInputError: unknown name (the message lists the known ones).
    """
    if name not in NAMED_SEQUENCES:
        raise QhlInputError(f"unknown sequence {name!r}; expected one of {', '.join(sorted(NAMED_SEQUENCES))}",
                            key="sequence")
    return Block(NAMED_SEQUENCES[name](tau_s, isotope), repeat, name)
