"""The ``dihedra`` command line: a thin layer over the Python API.

Each subcommand lives in its own module of this package with ``register(subparsers)``; modules are
discovered by name, so adding a subcommand never edits this file. User errors
(:class:`dihedra.errors.DihedraError`) print as one line without a traceback and exit with 2.
"""

from __future__ import annotations

import argparse
import importlib
import pkgutil
import sys
import warnings

from .._version import __version__
from ..errors import DihedraError

#: Preferred order of subcommands in --help; others follow alphabetically.
ORDER = ["demo", "run", "torsions", "track", "profile", "compare", "scan", "kinetics", "couplings", "refit",
         "windows", "figures", "report"]
_SKIP = {"common"}


def build_parser():
    parser = argparse.ArgumentParser(
        prog="dihedra",
        description="Conformer-aware torsion analysis of molecular-dynamics trajectories: torsion "
                    "states and populations with honest errors, free-energy profiles, comparison with "
                    "static scans and experiment, kinetics, figures and reports.",
        epilog="Run 'dihedra COMMAND --help' for the options of a command. Start with 'dihedra demo'.")
    parser.add_argument("--version", action="version", version=f"dihedra {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    names = [m.name for m in pkgutil.iter_modules(__path__) if m.name not in _SKIP]
    names.sort(key=lambda n: (ORDER.index(n) if n in ORDER else len(ORDER), n))
    for name in names:
        module = importlib.import_module(f"{__name__}.{name}")
        if hasattr(module, "register"):
            module.register(sub)
    return parser


def main(argv=None):
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 0
    warnings.filterwarnings("ignore", category=DeprecationWarning)
    warnings.filterwarnings("ignore", module="MDAnalysis")
    try:
        status = args.func(args)
    except DihedraError as exc:
        print(f"dihedra: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("dihedra: interrupted; no results folder was written.", file=sys.stderr)
        return 130
    return 0 if status is None else int(status)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
