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


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        rc = args.func(args)
    except QhlInputError as e:
        print(f"qhl: error: {e}", file=sys.stderr)
        return 2
    except BrokenPipeError:  # output piped into `head` and the like
        sys.stderr.close()
        return 0
    except KeyboardInterrupt:
        print("qhl: interrupted", file=sys.stderr)
        return 130
    return 0 if rc is None else int(rc)
