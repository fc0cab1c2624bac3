"""Fit the demo cluster's 21 offsets and dipolar couplings to synthetic data, with error bars.

Run: python examples/fit_demo.py
"""

import numpy as np

from qhl import ExactEngine, build_model, demo_cluster
from qhl.learning import ExactGradientProvider, fit, perturbed_start, relative_error
from qhl.exact.likelihood import synthetic_dataset

cluster = demo_cluster()
engine = ExactEngine(build_model(cluster))          # offsets and dipolar couplings free
truth = engine.model.free_values_hz

data = synthetic_dataset(engine, cluster.experiments, seed=1, sigma=1e-3)
start = perturbed_start(truth, 0.05, seed=1)        # every parameter 5% off
result = fit(ExactGradientProvider(engine, cluster.experiments), data, start, method="gn", max_iter=15)

print(f"{result.message} after {result.iterations} iterations")
print(f"{'parameter':<16}{'true (Hz)':>12}{'fitted (Hz)':>13}{'stderr (Hz)':>13}")
for name, t, v, e in zip(result.names, truth, result.values_hz, result.stderr_hz):
    print(f"{name:<16}{t:>12.2f}{v:>13.2f}{e:>13.3f}")
crb_limited = np.sqrt(np.sum(result.stderr_hz**2)) / np.linalg.norm(truth)
print(f"relative error {relative_error(result.values_hz, truth):.2e}, "
      f"Cramer-Rao-limited {crb_limited:.2e} (start: {relative_error(start, truth):.2e})")
