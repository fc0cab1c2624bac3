"""The CPU emulator backend: circuit families run on qiskit-aer with shots (see qhl.emulator)."""
