"""qhl: cost, check and run quantum-assisted Hamiltonian learning for nuclear-spin clusters.

Stages, in the order data flows (each imports only the ones before it; tests/test_layout.py):
    qhl.base       errors, memory estimates and refusal, BLAS threads
    qhl.spins      isotopes, dipolar constant, clusters, cluster files, the Hamiltonian model
    qhl.exact      sectors, the exact engine, powder averages, likelihood, signals, providers
    qhl.circuits   product formulas, Trotter bounds, the Trotterised reference, circuit families
    qhl.emulation  qiskit-aer runs of circuit families, estimates, `qhl check`
    qhl.costing    near-term and fault-tolerant budgets
    qhl.learning   fits, Fisher reports, measured data
    qhl.survey     cluster cutting, diagnostics, Dask scans
    qhl.report     one self-contained HTML report of a command run (--report)
    qhl.cli        the `qhl` command
"""

_PUBLIC = {
    "Cluster": ".spins.cluster", "Experiment": ".spins.cluster", "Pair": ".spins.cluster", "Spin": ".spins.cluster",
    "demo_cluster": ".spins.cluster_file", "load_cluster": ".spins.cluster_file", "load_xyz": ".spins.cluster_file",
    "parse_cluster_toml": ".spins.cluster_file",
    "ExactEngine": ".exact.engine",
    "MemoryBudgetError": ".base.errors", "QhlInputError": ".base.errors",
    "HamiltonianModel": ".spins.model", "Parameter": ".spins.model", "build_model": ".spins.model",
    "larmor_frequency_hz": ".spins.nuclei", "nucleus": ".spins.nuclei",
}
__all__ = list(_PUBLIC)
__version__ = "0.1.0"


from .base.lazy import lazy_attributes  # noqa: E402

__getattr__, __dir__ = lazy_attributes(__name__, _PUBLIC)
