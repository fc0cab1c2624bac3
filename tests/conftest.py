import sys
from pathlib import Path

# Shared test helpers (reference_dense.py) live beside the tests.
sys.path.insert(0, str(Path(__file__).parent))

import pytest  # noqa: E402


@pytest.fixture
def trio_file(tmp_path):
    """The invented three-proton cluster of made_up_clusters.TRIO_TOML, written to a file."""
    from made_up_clusters import TRIO_TOML
    p = tmp_path / "trio.toml"
    p.write_text(TRIO_TOML)
    return str(p)
