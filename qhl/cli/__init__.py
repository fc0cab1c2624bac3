"""The `qhl` command line: a thin layer over the Python API.

Each subcommand lives in a module `qhl/cli/cmd_<name>.py` that defines
`register(subparsers)`; the module is found automatically. Bad input (QhlInputError) is printed
as one line on stderr and exits with status 2, without a traceback.

Imports: any stage. Commands import their stage's API inside `run`, so `qhl --help` stays fast.
"""

import argparse
import importlib
import pkgutil
import sys

from ..base.errors import QhlInputError

__all__ = ["main", "build_parser"]


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # argparse's own usage errors: one line, exit 2
        self.exit(2, f"qhl: error: {message}\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="qhl", description="Cost, compile, emulate and check Hamiltonian learning "
                                             "for nuclear-spin clusters.")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    package = sys.modules[__name__]
    for info in sorted(pkgutil.iter_modules(package.__path__), key=lambda m: m.name):
        if info.name.startswith("cmd_"):
            importlib.import_module(f"{__name__}.{info.name}").register(sub)
    return parser


# keys of a cluster file's own entries: an error about one of them names the file (qhl.spins.cluster_file)
_FILE_KEYS = ("experiment", "spin", "spins", "pair", "observe", "field", "reference_ppm", "cluster", "hamiltonian")


def _with_file(error, args) -> str:
    """'FILE: ' when an error found after loading (an engine's refusal of an experiment, ...) concerns the
    cluster file's entries but does not name the file itself; else ''."""
    path = getattr(args, "cluster", None)
    key = getattr(error, "key", None) or ""
    if not isinstance(path, str) or getattr(error, "source", None) or str(error).startswith(path):
        return ""
    return f"{path}: " if key.split(".")[0].split("[")[0] in _FILE_KEYS else ""


def main(argv=None) -> int:
    """Run one command; bad input -> one line on stderr and status 2, Ctrl-C -> status 130.

    Warnings raised while a command runs are held back: a run that ends in a one-line error
    prints that line alone; any other run shows them after it finishes.
    """
    import warnings

    args = None
    try:
        parser = build_parser()          # imports every command module (numpy, ...): Ctrl-C may land here
        args = parser.parse_args(argv)
        args.argv = list(sys.argv[1:] if argv is None else argv)   # the command line, for --report
        with warnings.catch_warnings(record=True) as held:
            try:
                rc = args.func(args)
            except QhlInputError:
                held.clear()
                raise
        for w in held:
            warnings.showwarning(w.message, w.category, w.filename, w.lineno, w.file, w.line)
        if getattr(args, "failed_writes", None) and not rc:
            rc = 2                           # an output file could not be written (common.write_output)
    except QhlInputError as e:
        print(f"qhl: error: {_with_file(e, args)}{' '.join(str(e).split())}", file=sys.stderr)
        return 2
    except BrokenPipeError:  # output piped into `head` and the like
        sys.stderr.close()
        return 0
    except KeyboardInterrupt:
        print("qhl: interrupted", file=sys.stderr)
        return 130
    return 0 if rc is None else int(rc)
