"""qhl: cost, check and run quantum-assisted Hamiltonian learning for nuclear-spin clusters."""

from .cluster import Cluster, Experiment, Pair, Spin
from .cluster_file import demo_cluster, load_cluster, load_xyz, parse_cluster_toml
from .engine import ExactEngine
from .errors import MemoryBudgetError, QhlInputError
from .model import HamiltonianModel, Parameter, build_model
from .nuclei import larmor_frequency_hz, nucleus

__all__ = ["Cluster", "Experiment", "Pair", "Spin", "demo_cluster", "load_cluster", "load_xyz",
           "parse_cluster_toml", "ExactEngine", "MemoryBudgetError", "QhlInputError",
           "HamiltonianModel", "Parameter", "build_model", "larmor_frequency_hz", "nucleus"]
__version__ = "0.1.0"
