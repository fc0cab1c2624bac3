"""The Hamiltonian model: named parameters in Hz and their generators as SparsePauliOp.

Convention (rotating frame, high-field secular approximation):
    H = 2 pi * sum_n s_n(x) h_n G_n          (rad/s; h_n in Hz)
with spin operators I_a = sigma_a / 2 on qubit i = spin i (qiskit's little-endian order), and
the per-experiment factor s_n(x) = dipolar_scale of experiment x for dipolar terms, 1 otherwise.

Generators (Levitt, "Spin Dynamics", 2nd ed., 2008):
    offset:i           G = Iz_i
    dipolar:i-j homo   G = 3 Iz_i Iz_j - I_i.I_j = (2 ZZ - XX - YY) / 4
    dipolar:i-j hetero G = 2 Iz_i Iz_j = ZZ / 2
    j:i-j homo         G = I_i.I_j = (XX + YY + ZZ) / 4
    j:i-j hetero       G = Iz_i Iz_j = ZZ / 4
Dipolar values come from qhl.spins.dipolar unless a pair gives `dipolar_hz`.

The default free set (DEFAULT_FREE) leaves out parameters the observed signal cannot see
(qhl.spins.identifiability: generators that, alone or combined, commute with every term of H,
with rho0 and with O, e.g. the offset of a lone spin of an unobserved isotope); they are listed
in `HamiltonianModel.hidden`.
"""

from dataclasses import dataclass, replace
from fnmatch import fnmatchcase
import itertools

import numpy as np
from qiskit.quantum_info import SparsePauliOp

from .cluster import Cluster, Experiment
from .parameter_names import DEFAULT_FREE
from .dipolar import dipolar_coupling_hz
from ..base.errors import QhlInputError
from .nuclei import nucleus

__all__ = ["Parameter", "HamiltonianModel", "build_model", "spin_operator", "DEFAULT_FREE"]



@dataclass(frozen=True)
class Parameter:
    """One named Hamiltonian parameter: value in Hz and generator G (H = 2 pi h G)."""

    name: str
    kind: str            # 'offset' | 'dipolar' | 'j'
    spins: tuple         # labels
    value_hz: float
    generator: SparsePauliOp
    direction: tuple | None = None   # dipolar terms: unit internuclear vector (cluster frame), if positioned


def spin_operator(axis: str, qubit: int, n: int) -> SparsePauliOp:
    """I_axis on one qubit of n, axis in 'xyz'."""
    return SparsePauliOp.from_sparse_list([(axis.upper(), [qubit], 0.5)], num_qubits=n)


def _two(paulis_coeffs, i, j, n):
    return SparsePauliOp.from_sparse_list([(p, [i, j], c) for p, c in paulis_coeffs], num_qubits=n)


def _dipolar_generator(i, j, n, homonuclear):
    if homonuclear:
        return _two([("ZZ", 0.5), ("XX", -0.25), ("YY", -0.25)], i, j, n)
    return _two([("ZZ", 0.5)], i, j, n)


def _j_generator(i, j, n, homonuclear):
    if homonuclear:
        return _two([("XX", 0.25), ("YY", 0.25), ("ZZ", 0.25)], i, j, n)
    return _two([("ZZ", 0.25)], i, j, n)


@dataclass(frozen=True)
class HamiltonianModel:
    """Parameters, generators and which parameters are free, for one cluster.

    Attributes:
        labels, isotopes: per spin (qubit i = spin i).
        observed: tuple of bools, spins of the observed isotope.
        parameters: all parameters, fixed and free.
        free: names of the free parameters, in parameter order.
        hidden: parameters left out of the default free set because the signal cannot see them
            (qhl.spins.identifiability); empty for an explicit free set.
    """

    labels: tuple
    isotopes: tuple
    observed: tuple
    parameters: tuple
    free: tuple
    hidden: tuple = ()
    field_direction: tuple = (0.0, 0.0, 1.0)   # static field in the cluster frame (dipolar values use it)

    @property
    def n_spins(self) -> int:
        return len(self.labels)

    @property
    def names(self) -> list:
        return [p.name for p in self.parameters]

    @property
    def values_hz(self) -> np.ndarray:
        return np.array([p.value_hz for p in self.parameters])

    @property
    def free_indices(self) -> np.ndarray:
        names = self.names
        return np.array([names.index(f) for f in self.free], dtype=int)

    @property
    def free_values_hz(self) -> np.ndarray:
        return self.values_hz[self.free_indices]

    def all_values_hz(self, free_values_hz=None) -> np.ndarray:
        """Every parameter value (Hz, parameter order), the free ones replaced by `free_values_hz`.

        Raises:
            QhlInputError: free_values_hz not of shape (number of free parameters,).
        """
        values = self.values_hz
        if free_values_hz is not None:
            fv = np.asarray(free_values_hz, float)
            if fv.shape != (len(self.free),):
                raise QhlInputError(f"expected {len(self.free)} free parameter values, got shape {fv.shape}",
                                    key="values")
            values[self.free_indices] = fv
        return values

    def parameter(self, name: str) -> Parameter:
        for p in self.parameters:
            if p.name == name:
                return p
        raise QhlInputError(f"unknown parameter '{name}': expected one of {', '.join(self.names)}",
                            key="parameter")

    def with_free(self, patterns) -> "HamiltonianModel":
        """A copy whose free parameters are those matching any glob pattern ('dipolar:*')."""
        if isinstance(patterns, str):
            patterns = [patterns]
        chosen = [p.name for p in self.parameters if any(fnmatchcase(p.name, pat) for pat in patterns)]
        for pat in patterns:
            if not any(fnmatchcase(p.name, pat) for p in self.parameters) and pat not in DEFAULT_FREE:
                raise QhlInputError(f"no parameter matches '{pat}'", key="free")
        return replace(self, free=tuple(chosen), hidden=())

    def with_values(self, values_hz, free_only: bool = True) -> "HamiltonianModel":
        """A copy with new values for the free parameters (or all, with free_only=False)."""
        values_hz = np.asarray(values_hz, dtype=float)
        full = self.values_hz
        if free_only:
            full[self.free_indices] = values_hz
        else:
            full = values_hz
        params = tuple(replace(p, value_hz=float(v)) for p, v in zip(self.parameters, full))
        return replace(self, parameters=params)

    def scale_factors(self, experiment: Experiment | None) -> np.ndarray:
        """s_n for each parameter in `experiment` (dipolar terms times its dipolar_scale).

        Raises:
            QhlInputError: a spinning experiment (its factors change in time: qhl.spins.spinning).
        """
        if experiment is not None and float(getattr(experiment, "spinning_hz", 0.0) or 0.0) > 0:
            raise QhlInputError(f"experiment '{experiment.name}' spins ({experiment.spinning_hz:g} Hz): its dipolar "
                                f"factors change in time (qhl.spins.spinning.spinning_factors); this path covers "
                                f"static experiments only", key="experiment.spinning_hz")
        s = np.ones(len(self.parameters))
        if experiment is not None:
            for k, p in enumerate(self.parameters):
                if p.kind == "dipolar":
                    s[k] = experiment.dipolar_scale
        return s

    def hamiltonian(self, experiment: Experiment | None = None, values_hz=None) -> SparsePauliOp:
        """H in rad/s as a SparsePauliOp: 2 pi sum_n s_n h_n G_n."""
        vals = self.values_hz if values_hz is None else np.asarray(values_hz, float)
        coeffs = 2 * np.pi * vals * self.scale_factors(experiment)
        terms = [c * p.generator for c, p in zip(coeffs, self.parameters) if c != 0]
        if not terms:
            return SparsePauliOp("I" * self.n_spins, 0.0)
        return SparsePauliOp.sum(terms).simplify(atol=0)

    def with_rf_term(self, isotope: str, nutation_hz: float, axis: str = "x") -> "HamiltonianModel":
        """A copy with a continuous RF field on `isotope`: parameter 'rf:ISO' with G = sum I_axis.

        An RF term breaks the magnetisation symmetry, so the exact engine works in the full space.
        """
        iso = nucleus(isotope).symbol
        qubits = [i for i, s in enumerate(self.isotopes) if s == iso]
        if not qubits:
            raise QhlInputError(f"no spin of isotope {iso}", key="rf")
        if axis not in ("x", "y"):
            raise QhlInputError(f"expected axis x or y, got {axis!r}", key="rf")
        gen = SparsePauliOp.sum([spin_operator(axis, q, self.n_spins) for q in qubits])
        prm = Parameter(f"rf:{iso}", "rf", tuple(self.labels[q] for q in qubits), float(nutation_hz), gen)
        return replace(self, parameters=self.parameters + (prm,))

    def observed_qubits(self) -> list:
        return [i for i, o in enumerate(self.observed) if o]

    def initial_operator(self) -> SparsePauliOp:
        """rho0 = sum_i Ix_i over observed spins (deviation density after a 90-degree pulse)."""
        n = self.n_spins
        return SparsePauliOp.sum([spin_operator("x", i, n) for i in self.observed_qubits()])

    def detection_operator(self) -> SparsePauliOp:
        """O = sum_i I+_i = sum_i (Ix_i + i Iy_i) over observed spins."""
        n = self.n_spins
        return SparsePauliOp.sum([spin_operator("x", i, n) + 1j * spin_operator("y", i, n)
                                  for i in self.observed_qubits()])


def build_model(cluster: Cluster, free=DEFAULT_FREE, orientation=None) -> HamiltonianModel:
    """Build the secular Hamiltonian model of `cluster`.

    Every spin gets an offset parameter; every pair of positioned spins gets a dipolar term
    (its value from geometry, or the pair's `dipolar_hz`); pairs with `j_hz` get a J term.

    Args:
        free: glob patterns of free parameter names. The default (DEFAULT_FREE, offsets and dipolar
            couplings) leaves out the parameters the signal cannot see and lists them in
            `hidden`; naming patterns explicitly keeps every match.
        orientation: optional field direction overriding the cluster's (for powder averages).
    """
    n = cluster.n_spins
    labels = tuple(cluster.labels)
    isotopes = tuple(nucleus(s.isotope).symbol for s in cluster.spins)
    observed = tuple(iso == cluster.observe for iso in isotopes)
    direction = cluster.field_direction if orientation is None else orientation
    params = []
    for i, s in enumerate(cluster.spins):
        params.append(Parameter(f"offset:{s.label}", "offset", (s.label,), float(s.offset_hz),
                                spin_operator("z", i, n)))
    overrides = {frozenset(p.spins): p for p in cluster.pairs}
    for i, j in itertools.combinations(range(n), 2):
        si, sj = cluster.spins[i], cluster.spins[j]
        homo = isotopes[i] == isotopes[j]
        pair = overrides.get(frozenset((si.label, sj.label)))
        value = None
        vec = None
        if si.position_angstrom is not None and sj.position_angstrom is not None:
            d = np.subtract(sj.position_angstrom, si.position_angstrom, dtype=float)
            norm = float(np.linalg.norm(d))
            vec = tuple(float(x) for x in d / norm) if norm > 0 else None
        if pair is not None and pair.dipolar_hz is not None:
            value = float(pair.dipolar_hz)
        elif si.position_angstrom is not None and sj.position_angstrom is not None:
            value = dipolar_coupling_hz(nucleus(si.isotope).gamma_rad_per_s_per_tesla,
                                        nucleus(sj.isotope).gamma_rad_per_s_per_tesla,
                                        si.position_angstrom, sj.position_angstrom, direction)
        if value is not None:
            params.append(Parameter(f"dipolar:{si.label}-{sj.label}", "dipolar", (si.label, sj.label),
                                    value, _dipolar_generator(i, j, n, homo), vec))
    for i, j in itertools.combinations(range(n), 2):
        si, sj = cluster.spins[i], cluster.spins[j]
        pair = overrides.get(frozenset((si.label, sj.label)))
        if pair is not None and pair.j_hz is not None:
            params.append(Parameter(f"j:{si.label}-{sj.label}", "j", (si.label, sj.label), float(pair.j_hz),
                                    _j_generator(i, j, n, isotopes[i] == isotopes[j])))
    model = HamiltonianModel(labels=labels, isotopes=isotopes, observed=observed,
                             parameters=tuple(params), free=(),
                             field_direction=tuple(float(x) for x in np.asarray(direction, float)
                                                   / np.linalg.norm(direction)))
    patterns = [free] if isinstance(free, str) else list(free)
    model = model.with_free(patterns) if patterns else model
    if tuple(patterns) == tuple(DEFAULT_FREE):
        from .identifiability import unidentifiable_parameters
        hidden = unidentifiable_parameters(model)
        if hidden:
            model = replace(model, free=tuple(f for f in model.free if f not in hidden), hidden=tuple(hidden))
    return model
