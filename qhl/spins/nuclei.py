"""Spin-1/2 nuclei and their gyromagnetic ratios.

Values are the IUPAC recommendations: R. K. Harris, E. D. Becker, S. M. Cabral de Menezes,
R. Goodfellow, P. Granger, "NMR nomenclature. Nuclear spin properties and conventions for
chemical shifts", Pure Appl. Chem. 73, 1795 (2001), Table 1, in units of 1e7 rad s^-1 T^-1.

Convention: the Larmor frequency of an isotope in field B is nu0 = |gamma| B / (2 pi) in Hz.
"""

from dataclasses import dataclass

from ..base.errors import QhlInputError

__all__ = ["Nucleus", "nucleus", "larmor_frequency_hz", "SPIN_HALF", "HIGHER_SPIN"]


@dataclass(frozen=True)
class Nucleus:
    """A spin-1/2 isotope: its symbol (e.g. '13C') and gyromagnetic ratio in rad s^-1 T^-1."""

    symbol: str
    gamma_rad_per_s_per_tesla: float


# IUPAC 2001 (Harris et al.), gamma / (1e7 rad s^-1 T^-1).
SPIN_HALF = {
    "1H": 26.7522128,
    "13C": 6.728284,
    "15N": -2.71261804,
    "19F": 25.18148,
    "29Si": -5.3190,
    "31P": 10.8394,
}

# Nuclei with spin > 1/2 that users may name: refused, since qubits model spin-1/2 only.
HIGHER_SPIN = {"2H": "1", "6Li": "1", "7Li": "3/2", "10B": "3", "11B": "3/2", "14N": "1",
               "17O": "5/2", "23Na": "3/2", "27Al": "5/2", "33S": "3/2", "35Cl": "3/2",
               "37Cl": "3/2", "39K": "3/2", "43Ca": "7/2", "51V": "7/2", "59Co": "7/2",
               "63Cu": "3/2", "65Cu": "3/2", "67Zn": "5/2", "79Br": "3/2", "81Br": "3/2"}

_ALIASES = {"H": "1H", "C": "13C", "N": "15N", "F": "19F", "P": "31P", "Si": "29Si", "D": "2H"}


def nucleus(symbol: str) -> Nucleus:
    """Look up an isotope by its symbol ('1H', '13C', ...).

    Raises:
        QhlInputError: for an unknown isotope or one with spin > 1/2.
    """
    s = _ALIASES.get(str(symbol).strip(), str(symbol).strip())
    if s in SPIN_HALF:
        return Nucleus(s, SPIN_HALF[s] * 1e7)
    if s in HIGHER_SPIN:
        raise QhlInputError(
            f"isotope '{s}' has spin {HIGHER_SPIN[s]}; qhl models spin-1/2 nuclei only "
            f"(one qubit each): choose one of {', '.join(SPIN_HALF)}"
        )
    raise QhlInputError(f"unknown isotope '{symbol}': expected one of {', '.join(SPIN_HALF)}")


def larmor_frequency_hz(symbol: str, field_tesla: float) -> float:
    """Larmor frequency |gamma| B / 2 pi in Hz."""
    import math

    return abs(nucleus(symbol).gamma_rad_per_s_per_tesla) * field_tesla / (2 * math.pi)
