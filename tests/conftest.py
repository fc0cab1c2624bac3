import sys
from pathlib import Path

# Shared test helpers (reference_dense.py) live beside the tests.
sys.path.insert(0, str(Path(__file__).parent))
