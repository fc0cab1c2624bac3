"""Learning: fits (GN/LM, CG, L-BFGS-B) behind the gradient-provider protocol, Fisher reports,
measured-data readers and fit plots.

Imports: everything below it (base, spins, exact, circuits, emulation, costing).

Public API: `fit`, `learn`, `evaluate_cost`, `perturbed_start`, `relative_error`, `FitResult`,
`LearnReport`, the providers (`GradientProvider`, `ExactGradientProvider`,
`emulated_gradient_provider`); `plan_emulated_run`, `EmulatedRunPlan`, `trotter_signal_target`
(Trotter steps and predicted time of an emulated fit); qhl.learning.fisher_report, qhl.learning.data_csv.
"""

_PUBLIC = {name: ".fitting" for name in (
    "GradientProvider", "ExactGradientProvider", "CostPoint", "FitResult", "evaluate_cost", "fit", "perturbed_start",
    "emulated_gradient_provider", "relative_error", "LearnReport", "learn", "DECREMENT_TOL", "NOISY_STALL_TOL",
    "NOISY_PATIENCE")}
_PUBLIC["METHODS"] = ".methods"
_PUBLIC.update({name: ".emulated_run" for name in ("EmulatedRunPlan", "plan_emulated_run", "trotter_signal_target",
                                                    "DEFAULT_MAX_MINUTES")})
__all__ = list(_PUBLIC)


from ..base.lazy import lazy_attributes  # noqa: E402

__getattr__, __dir__ = lazy_attributes(__name__, _PUBLIC)
