"""The ``raytrace`` command line: one subcommand per module in this package.

Each subcommand module defines ``NAME``, ``HELP``, ``add_arguments(parser)`` and
``run(args) -> int``. Errors caused by the user's input (InputError) print one
line and exit with status 2; anything else is a bug: exit status 1 with a
pointer to report it.
"""

import argparse
import re
import sys
import warnings
from importlib import import_module

from raytrace import __version__
from raytrace.core.errors import InputError

# Subcommand modules, in the order of the data flow.
_SUBCOMMANDS = ("background", "inspect", "grid", "onepoint_mean", "sightlines", "sky", "spread_check",
                "resolution_check", "limits", "report", "dark_radiation")
_NEGATIVE_NUMBER = re.compile(r"^-(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?$")


def build_parser():
    parser = argparse.ArgumentParser(
        prog="raytrace",
        description=(
            "Monte Carlo sightlines through electron-density boxes: resonant photon to "
            "dark-photon conversion, its spread between sightlines, sky maps and CMB limits."
        ),
    )
    parser.add_argument("--version", action="version", version=f"raytrace {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND")
    for module_name in _SUBCOMMANDS:
        module = import_module(f".{module_name}", __name__)
        sub = commands.add_parser(module.NAME, help=module.HELP, description=module.HELP)
        # argparse takes '-1e-13' for a flag (its own pattern knows no exponent): a value, so that
        # the option's check names the flag and says what it expects.
        sub._negative_number_matcher = _NEGATIVE_NUMBER
        module.add_arguments(sub)
        sub.set_defaults(_run=module.run)
    return parser


def main(argv=None):
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 2

    def show_warning(message, category, filename, lineno, file=None, line=None):
        print(f"raytrace {args.command}: warning: {message}", file=sys.stderr)

    warnings.showwarning = show_warning
    try:
        return int(args._run(args) or 0)
    except InputError as error:
        print(f"raytrace {args.command}: error: {error}", file=sys.stderr)
        return 2
    except MemoryError as error:  # sizes the user asked for (cells, rays, step), not a bug
        print(f"raytrace {args.command}: error: not enough memory for what the options ask ({error}); "
              "ask for less: fewer cells, rays or masses", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"raytrace {args.command}: interrupted", file=sys.stderr)
        return 130
    except Exception as error:  # a bug, not the user's fault
        import traceback

        traceback.print_exc()
        print(
            f"raytrace {args.command}: internal error ({type(error).__name__}: {error}). "
            "This is a bug in raytrace; please report it with the command and the traceback above.",
            file=sys.stderr,
        )
        return 1


if __name__ == "__main__":
    sys.exit(main())
