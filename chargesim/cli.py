"""The command line: ``chargesim run|check|field|report|sweep|relax|verify``.

Exit codes: 0 success, 1 a failure while running, 2 bad input or usage. Every
failure is one clear message on stderr, never a traceback (``--debug`` shows
it). Progress bars go to stderr, and only when stderr is a terminal and
``--quiet`` is not given. Logging goes through :mod:`logging` (``-v``).
"""
import argparse
import importlib
import json
import logging
import os
import sys

from ._version import __version__

log = logging.getLogger("chargesim")

#: Subcommands provided by other modules: name -> (module, help).
_DELEGATED = {
    "sweep": ("chargesim.sweep", "run a parameter sweep over a base scenario"),
    "relax": ("chargesim.layout", "relax a layout of charges to equilibrium and check its stability"),
    "verify": ("chargesim.verify", "check the engine against published reference values"),
}


class UsageError(Exception):
    """Bad input found by a command (exit code 2)."""


class _Parser(argparse.ArgumentParser):
    """argparse, with the program name on every usage error."""

    def error(self, message):
        self.print_usage(sys.stderr)
        self.exit(2, f"{self.prog}: error: {message}\n")


def _add_common(p):
    p.add_argument("-v", "--verbose", action="count", default=0, help="more log messages (-vv for debug)")
    p.add_argument("--debug", action="store_true", help="show the traceback of an unexpected error")


def _parser(wanted=None):
    top = _Parser(
        prog="chargesim",
        description="Point-charge electrostatics and charged-particle motion: precipitators, "
                    "electrostatic spraying and coating, layouts of charges.",
        epilog="Run 'chargesim COMMAND --help' for the options of a command.",
    )
    top.add_argument("--version", action="version", version=f"chargesim {__version__}")
    sub = top.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    p = sub.add_parser("run", help="run a scenario and write the results (HDF5)",
                       description="Run a scenario. With -o the results go to an HDF5 file (written under a "
                                   "temporary name and renamed when complete); without -o only the summary "
                                   "is printed.")
    p.add_argument("scenario", metavar="SCENARIO", help="scenario file (TOML)")
    p.add_argument("-o", "--output", metavar="OUT.h5", help="results file to write")
    p.add_argument("--overwrite", action="store_true", help="replace an existing results file")
    p.add_argument("--resume", action="store_true",
                   help="continue a killed run from its last checkpoint (needs -o)")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress bar, no summary")
    p.add_argument("--threads", type=int, metavar="N", help="numba threads (default: all cores)")
    _add_common(p)

    p = sub.add_parser("check", help="validate a scenario and show what a run would do",
                       description="Validate a scenario and show what a run would do: particle counts, steps, "
                                   "Coulomb methods, memory and run-time estimates, and safety findings.")
    p.add_argument("scenario", metavar="SCENARIO", help="scenario file (TOML)")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    _add_common(p)

    p = sub.add_parser("field", help="write only the field grids of the applied sources and fixed charges",
                       description="Compute the field grids the scenario asks for ([[output.field_grids]]) "
                                   "from the applied sources and fixed charges only, without moving particles.")
    p.add_argument("scenario", metavar="SCENARIO", help="scenario file (TOML)")
    p.add_argument("-o", "--output", metavar="OUT.h5", help="file to write the grids to (without it, only their "
                                                            "ranges are printed)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing file")
    p.add_argument("-q", "--quiet", action="store_true", help="print nothing on success")
    _add_common(p)

    p = sub.add_parser("report", help="figures (PNG) and a text summary of a results file",
                       description="Make the report of a results file: PNG figures and a text summary.")
    p.add_argument("results", metavar="OUT.h5", help="results file")
    p.add_argument("-o", "--output", metavar="DIR", help="directory for the report (default: OUT_report "
                                                         "beside the results file)")
    p.add_argument("-q", "--quiet", action="store_true", help="print nothing on success")
    _add_common(p)

    for name, (module, help_text) in _DELEGATED.items():
        p = sub.add_parser(name, help=help_text, description=help_text.capitalize() + ".", add_help=True)
        if name != wanted:
            continue  # the module is imported only for its own command (quick start, no hard dependency)
        try:
            mod = importlib.import_module(module)
            if not (callable(getattr(mod, "add_arguments", None)) and callable(getattr(mod, "command", None))):
                raise ImportError(f"{module} provides no add_arguments/command")
            mod.add_arguments(p)
        except Exception as exc:  # not importable or not finished: the command says so
            log.debug("cannot set up %s", module, exc_info=True)
            p.set_defaults(_missing=f"{module}: {type(exc).__name__}: {exc}")
            p.add_argument("rest", nargs=argparse.REMAINDER, help=argparse.SUPPRESS)
        else:
            p.set_defaults(_delegate=mod)
        if not any(a.dest == "verbose" for a in p._actions):
            _add_common(p)
    return top


def _command_in(argv):
    """The first word of ``argv`` that is not an option (the subcommand), or None."""
    for a in argv:
        if not a.startswith("-"):
            return a
        if a == "--":
            return None
    return None


def _setup_logging(verbose):
    level = logging.WARNING if verbose <= 0 else logging.INFO if verbose == 1 else logging.DEBUG
    root = logging.getLogger("chargesim")
    if not root.handlers:
        handler = logging.StreamHandler(sys.stderr)
        handler.setFormatter(logging.Formatter("%(levelname)s: %(name)s: %(message)s"))
        root.addHandler(handler)
    root.setLevel(level)
    logging.captureWarnings(True)


def show_progress(quiet):
    """Whether to draw progress bars: not quiet and stderr is a terminal."""
    return not quiet and hasattr(sys.stderr, "isatty") and sys.stderr.isatty()


def _err(message):
    print(f"chargesim: error: {message}", file=sys.stderr)


def main(argv=None):
    """Run the command line; returns the exit code (0, 1 or 2)."""
    argv = sys.argv[1:] if argv is None else list(argv)
    parser = _parser(_command_in(argv))
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # --help, --version (0) and usage errors (2)
        return int(exc.code or 0)
    if args.command is None:
        parser.print_help(sys.stderr)
        return 2
    _setup_logging(getattr(args, "verbose", 0))
    from .scenario.errors import ScenarioError

    try:
        if getattr(args, "_missing", None):
            _err(f"the '{args.command}' command is not available in this installation "
                 f"({args._missing})")
            return 1
        if getattr(args, "_delegate", None) is not None:
            return int(args._delegate.command(args))
        return int(_COMMANDS[args.command](args))
    except (ScenarioError, UsageError) as exc:
        _err(str(exc))
        return 2
    except KeyboardInterrupt:
        _err("interrupted")
        return 1
    except BrokenPipeError:  # the reader of our output went away (| head): stop quietly
        sys.stdout = open(os.devnull, "w")  # nothing more to flush at exit
        return 1
    except Exception as exc:  # a failure while running: one message, no traceback
        if getattr(args, "debug", False):
            raise
        log.debug("traceback", exc_info=True)
        _err(f"{type(exc).__name__}: {exc}")
        return 1


# -- commands -------------------------------------------------------------
def _cmd_run(args):
    from . import scenario as sc
    from .scenario import summary

    if args.resume and not args.output:
        raise UsageError("--resume needs the results file: -o OUT.h5")
    if args.resume and args.overwrite:
        raise UsageError("--resume and --overwrite do not go together")
    if args.threads is not None and args.threads < 1:
        raise UsageError(f"--threads must be at least 1, got {args.threads}")
    s = sc.load_scenario(args.scenario)
    if args.output:
        _check_output(args.output, args.overwrite or args.resume)
    result = sc.run(s, output=args.output, overwrite=args.overwrite, resume=args.resume,
                    quiet=not show_progress(args.quiet), threads=args.threads)
    if not args.quiet:
        print(summary.describe_result(s, result, args.output))
    return 0


def _check_output(path, allowed):
    if os.path.isdir(path):
        raise UsageError(f"{path}: is a directory; give a file name for the results")
    if os.path.exists(path) and not allowed:
        raise UsageError(f"{path}: exists already; use --overwrite to replace it (or --resume to continue it)")
    parent = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(parent):
        raise UsageError(f"{path}: the directory {parent} does not exist")


def _cmd_check(args):
    from . import scenario as sc
    from .scenario import summary

    s = sc.load_scenario(args.scenario)
    p = summary.plan(s)
    if args.json:
        print(json.dumps(p, indent=2, sort_keys=False, default=_jsonable))
    else:
        print(summary.render_text(p))
    return 0


def _jsonable(x):
    import numpy as np

    if isinstance(x, np.ndarray):
        return x.tolist()
    if isinstance(x, np.generic):
        return x.item()
    raise TypeError(f"not JSON serializable: {type(x).__name__}")


def _cmd_field(args):
    from . import scenario as sc

    s = sc.load_scenario(args.scenario)
    if not s["output"]["field_grids"]:
        raise UsageError(f"{args.scenario}: output.field_grids: the scenario asks for no field grids; "
                         "add an [[output.field_grids]] section")
    if args.output is None:  # output only where the user says: without -o, show the grids' ranges
        import numpy as np

        from .scenario.build import build
        from .scenario.runner import field_grid

        built = build(s, fields_only=True)
        for g in s["output"]["field_grids"]:
            _, phi, e = field_grid(built, g)
            emag = np.linalg.norm(e, axis=-1)
            print(f"{g['name']}: {'x'.join(str(n) for n in g['shape'])} points, potential {phi.min():.4g} .. "
                  f"{phi.max():.4g} V, field magnitude up to {emag.max():.4g} V/m (write them with -o OUT.h5)")
        return 0
    _check_output(args.output, args.overwrite)
    names = sc.run_fields(s, args.output, overwrite=args.overwrite)
    if not args.quiet:
        print(f"wrote field grid(s) {', '.join(names)} to {args.output}")
    return 0


def _cmd_report(args):
    if not os.path.exists(args.results):
        raise UsageError(f"{args.results}: no such file")
    try:
        from .plots import make_report
    except ImportError as exc:
        _err(f"the report is not available in this installation ({exc})")
        return 1
    out = args.output
    if out is None:
        out = os.path.splitext(args.results)[0] + "_report"
    from .io import open_results

    try:
        open_results(args.results)
    except ValueError as exc:  # not our format, corrupt or truncated: bad input
        raise UsageError(str(exc)) from None
    made = make_report(args.results, out)
    if not args.quiet:
        print(f"report written to {out}")
        if isinstance(made, (list, tuple)):
            for f in made:
                print(f"  {f}")
    return 0


_COMMANDS = {"run": _cmd_run, "check": _cmd_check, "field": _cmd_field, "report": _cmd_report}


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
