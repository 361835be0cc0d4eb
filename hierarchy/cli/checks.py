"""Checks of a command line before any work: bounds of the numeric options,
input paths, and output paths (none may overwrite an input or another
output). Each failure is one message with its option and a fix."""

from __future__ import annotations

from hierarchy.errors import InputError

__all__ = ["MAX_WORKERS", "MAX_RESTARTS", "MAX_ITER", "MAX_SEED", "MAX_CHAINS", "MAX_STEPS",
           "MAX_CHAIN_STEPS", "MAX_VALUE"]

def _render_output(args) -> str:
    """Where `render` draws: ``--output``, else the result's name with ``.png``."""
    import os

    return args.output or os.path.splitext(args.result)[0] + ".png"


def _planned_outputs(args) -> list:
    """The files this command was asked to write (inputs excluded)."""
    names = ["json", "plot"] + (["gains"] if args.command == "design" else [])
    out = [getattr(args, n, None) for n in names]
    out.append(_render_output(args) if args.command == "render" else getattr(args, "output", None))
    base = getattr(args, "out", None)
    if base:
        out += [f"{base}.csv", f"{base}.json"]
    return [str(p) for p in out if isinstance(p, str) and p]


def _check_outputs(args) -> None:
    """Refuse an output that would overwrite an input, or another output."""
    import os

    inputs = [getattr(args, n, None) for n in ("spec", "start", "result", "data", "graph", "template")]
    inputs += list(getattr(args, "specs", None) or [])
    if args.command != "design":
        inputs.append(getattr(args, "gains", None))
    seen = {}
    for path in [p for p in inputs if isinstance(p, str) and p]:  # sweep's --from is a number
        seen.setdefault(os.path.realpath(path), ("input", path))
    for path in _planned_outputs(args):
        key = os.path.realpath(path)
        if key in seen:
            what, first = seen[key]
            raise InputError(f"this output would overwrite the {what} {first}", place=path,
                             fix="give each output its own file name")
        seen[key] = ("output", path)


# ---------------------------------------------------------------------------
# option checks: every option is checked here, before any file is read or
# anything is computed (exit 2 with one message)

#: Bounds of the numeric options; each is far beyond any sensible use, and
#: keeps the work a command can be asked for finite.
MAX_WORKERS = 256
MAX_RESTARTS = 1000
MAX_ITER = 10_000_000
MAX_SEED = 2**63 - 1
MAX_CHAINS = 1000
MAX_STEPS = 100_000_000
MAX_CHAIN_STEPS = 1_000_000_000  # chains x steps
#: Study values (--from/--to, ranges) are spec values, bounded like them.
MAX_VALUE = 1e12


def _bad_option(option, message, fix):
    raise InputError(message, place=option, fix=fix)


def _int_between(args, name, option, lo, hi):
    value = getattr(args, name, None)
    if value is not None and not lo <= value <= hi:
        _bad_option(option, f"must be a whole number from {lo:,} to {hi:,}; got {value:,}",
                    f"give {option} a value from {lo:,} to {hi:,}")


def _study_value(value, option):
    import math

    if not (math.isfinite(value) and abs(value) <= MAX_VALUE):
        _bad_option(option, f"a study value must be a finite number of at most {MAX_VALUE:g} in size; "
                            f"got {value:g}", f"give {option} a value between -{MAX_VALUE:g} and {MAX_VALUE:g}")


def _check_input_path(path, option):
    if not isinstance(path, str):  # absent, or sweep's --from (dest `start`), a number
        return
    if not path:
        _bad_option(option, "the input path is empty", "give the path of a file")
    if path.endswith("/") and not __import__("os").path.isdir(path):  # Path() would silently drop it
        _bad_option(option, "an input file's path cannot end with '/'", "give the path of a file, without a "
                                                                         "trailing '/'")


def _check_options(args) -> None:
    """Every option of ``args`` within its bounds; output paths writable."""
    import math

    from hierarchy.io import check_output

    for name, option in (("spec", "SPEC"), ("gains", "--gains"), ("start", "--start"), ("result", "RESULT"),
                         ("data", "DATA"), ("graph", "FILE"), ("template", "--template")):
        if not (name == "gains" and args.command == "design"):
            _check_input_path(getattr(args, name, None), option)
    for path in getattr(args, "specs", None) or []:
        _check_input_path(path, "SPEC")
    _int_between(args, "workers", "--workers", 1, MAX_WORKERS)
    _int_between(args, "restarts", "--restarts", 1, MAX_RESTARTS)
    _int_between(args, "max_iter", "--max-iter", 1, MAX_ITER)
    _int_between(args, "seed", "--seed", 0, MAX_SEED)
    if args.command == "simulate":
        _int_between(args, "chains", "--chains", 2, MAX_CHAINS)
        _int_between(args, "steps", "--steps", 100, MAX_STEPS)
        if args.chains * args.steps > MAX_CHAIN_STEPS:
            _bad_option("--steps/--chains", f"{args.chains:,} chains x {args.steps:,} steps is more than "
                                            f"{MAX_CHAIN_STEPS:,} steps in all",
                        "use fewer chains or fewer steps per chain")
        if not 0 < args.level < 1:
            _bad_option("--level", f"an interval level is a fraction between 0 and 1; got {args.level:g}",
                        "use e.g. --level 0.99")
    if args.command == "compare":
        if len(args.specs) < 2:
            _bad_option("SPEC", "a comparison needs at least two specs; got one",
                        "give two or more specs, or use `hierarchy design` or `sweep` for one")
        if not (math.isfinite(args.tie) and 0 <= args.tie < 1):
            _bad_option("--tie", f"a relative tolerance is a number from 0 to below 1; got {args.tie:g}",
                        "use e.g. --tie 1e-5")
    if args.command == "import-graph":
        for option in ("price", "noise", "budget"):
            value = getattr(args, option)
            if value is not None and not (math.isfinite(value) and 0 <= value <= MAX_VALUE):
                _bad_option(f"--{option}", f"must be a finite number from 0 to {MAX_VALUE:g}; got {value:g}",
                            f"give --{option} a value of 0 or more")
    if args.command == "fit-world":
        from hierarchy.spec.fitworld import MAX_LAGS

        _int_between(args, "lags", "--lags", 1, MAX_LAGS)
        _int_between(args, "whiteness_lags", "--whiteness-lags", 1, 10_000)
    if args.command == "sweep":
        _study_value(args.start, "--from")
        _study_value(args.stop, "--to")
    if args.command in ("phase", "compare"):
        from hierarchy.studies import parse_range

        options = ("--x-range", "--y-range") if args.command == "phase" else \
            ("--prices",) if args.prices is not None else ("--budgets",)
        for option in options:
            lo, hi, _ = parse_range(getattr(args, option[2:].replace("-", "_")), option)
            _study_value(lo, option)
            _study_value(hi, option)
    for option, path in _named_outputs(args):
        check_output(path, option)


def _named_outputs(args) -> list:
    """``(option, path)`` of every file this command was asked to write."""
    named = [("--json", getattr(args, "json", None)), ("--plot", getattr(args, "plot", None))]
    if args.command == "design":
        named.append(("--gains", args.gains))
    if args.command == "render":
        named.append(("--output", _render_output(args)))
    elif args.command in ("generate", "fit-world", "import-graph"):
        named.append(("--output", args.output))
    if args.command in ("sweep", "phase", "compare"):
        import os

        if args.out is not None and not args.out:
            _bad_option("--out", "the output path is empty", "give a base name, e.g. results/run")
        first = args.spec if args.command != "compare" else args.specs[0]
        base = args.out or f"{os.path.splitext(os.path.basename(first))[0]}-{args.command}"
        if os.path.splitext(base)[1].lower() in (".csv", ".json"):
            base = os.path.splitext(base)[0]
        named += [("--out", f"{base}.csv"), ("--out", f"{base}.json")]
        if os.path.exists(f"{base}.parts") and not os.path.isdir(f"{base}.parts"):
            _bad_option("--out", f"{base}.parts exists and is not a folder (it keeps a study's finished points)",
                        "move that file away, or choose another --out")
    return [(o, p) for o, p in named if p is not None]
