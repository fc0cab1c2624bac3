"""Helpers shared by the CLI commands: cluster argument, JSON output, output paths."""

import json
import math
from pathlib import Path
import sys

import numpy as np

from ..spins.cluster_file import demo_cluster, load_cluster
from ..base.errors import QhlInputError

__all__ = ["add_cluster_argument", "cluster_from_args", "print_json", "check_output_path",
           "positive_float", "positive_int", "integer_at_least"]


def add_cluster_argument(parser):
    parser.add_argument("cluster", nargs="?", default=None, metavar="CLUSTER",
                        help="cluster file (.toml or .xyz); the built-in demo cluster when omitted")


def cluster_from_args(args):
    return demo_cluster() if args.cluster is None else load_cluster(args.cluster)


def _plain(obj):
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _plain(obj.tolist())
    if isinstance(obj, (np.floating, float)):
        v = float(obj)
        return v if math.isfinite(v) else (None if math.isnan(v) else ("inf" if v > 0 else "-inf"))
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    return obj


def print_json(obj, stream=None):
    """Print one JSON object (numpy values converted; inf as the string "inf")."""
    json.dump(_plain(obj), stream or sys.stdout, indent=1)
    (stream or sys.stdout).write("\n")


def check_output_path(path, option):
    """Refuse an output path whose folder does not exist or cannot be written."""
    p = Path(path)
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise QhlInputError(f"cannot write '{path}': folder '{parent}' does not exist", key=option)
    try:
        with open(p, "ab"):
            pass
    except OSError as e:
        raise QhlInputError(f"cannot write '{path}': {e.strerror}", key=option) from None
    return p


def positive_float(text):
    import argparse
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not math.isfinite(v) or v <= 0:
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}")
    return v


def integer_at_least(minimum: int):
    """An argparse type: an integer >= `minimum`."""
    import argparse

    def parse(text):
        try:
            v = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected an integer, got {text!r}") from None
        if v < minimum:
            raise argparse.ArgumentTypeError(f"expected an integer >= {minimum}, got {text!r}")
        return v
    return parse


positive_int = integer_at_least(1)
