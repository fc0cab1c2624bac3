"""The emulator: shot-based S, dS/dh and Hessian entries on qiskit-aer, checked against exact ones.

Imports: qhl.base, qhl.spins, qhl.exact, qhl.circuits (everything that executes circuits lives here).

Public API (implementation in its modules):
    FamilyRunner            transpile a circuit family once, run grouped shot settings (runner)
    Estimate, ComplexEstimate   merging (+) Monte Carlo results with standard errors (estimate)
    NoiseSpec, predicted_shrink, noisy_layers   depolarising / readout noise (noise)
    emulate_signal, emulate_gradient, emulate_hessian, estimate_family, emulate_gradients   (derivatives)
    FastFamily, EvolutionTables   exact outcome probabilities without Aer (fast_path)
    nll_gradient, neyman_allocation   NLL gradient with optimal shot allocation (allocation)
    gradient_provider       a qhl.learning.GradientProvider with noisy = True (provider)
    check_derivatives       the table of `qhl check` (check)
"""

from .allocation import NllGradient, neyman_allocation, nll_gradient, single_shot_bound
from .check import CheckReport, check_derivatives
from .derivatives import emulate_gradient, emulate_gradients, emulate_hessian, emulate_signal, estimate_family
from .fast_path import EvolutionTables, FastFamily
from .estimate import ComplexEstimate, Estimate
from .noise import NoiseSpec, noisy_layers, predicted_shrink
from .provider import EmulatedGradientProvider
from .runner import FamilyRunner, group_settings, outcome_values

__all__ = ["FamilyRunner", "group_settings", "outcome_values", "Estimate", "ComplexEstimate", "NoiseSpec",
           "noisy_layers", "predicted_shrink", "emulate_signal", "emulate_gradient", "emulate_hessian",
           "estimate_family", "emulate_gradients", "FastFamily", "EvolutionTables",
           "NllGradient", "neyman_allocation", "nll_gradient", "single_shot_bound", "EmulatedGradientProvider",
           "gradient_provider", "CheckReport", "check_derivatives"]


def gradient_provider(model, experiments, shots, seed=0, **options) -> EmulatedGradientProvider:
    """The emulated GradientProvider qhl.learning uses for `--gradients emulated`.

    Args:
        model: HamiltonianModel; experiments: Experiment list; shots: per part of each estimate;
        seed: int; options: steps, eps, order, noise (see EmulatedGradientProvider).

    Raises:
        QhlInputError: shots < 1, bad seed or steps.
    """
    return EmulatedGradientProvider(model, experiments, shots, seed, **options)
