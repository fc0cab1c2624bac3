"""Lazy public names for package __init__ files (PEP 562 module __getattr__).

Importing a light submodule, or starting the command line, must not pull in qiskit, scipy and
qiskit-aer: a package lists its public names and the submodule of each, and each loads on first use.
"""

import importlib

__all__ = ["lazy_attributes"]


def lazy_attributes(package: str, public: dict):
    """(__getattr__, __dir__) for `package`, whose names map to relative submodule paths.

    Example:
        >>> getattr_, dir_ = lazy_attributes("qhl", {"QhlInputError": ".base.errors"})
        >>> getattr_("QhlInputError").__name__
        'QhlInputError'
    """
    def __getattr__(name):
        if name in public:
            module = importlib.import_module(public[name], package)
            value = getattr(module, name)
            setattr(importlib.import_module(package), name, value)
            return value
        raise AttributeError(f"module {package!r} has no attribute {name!r}")

    def __dir__():
        return sorted(set(vars(importlib.import_module(package))) | set(public))

    return __getattr__, __dir__
