"""Command line: a thin layer over the Python API. Every user error prints
one clear message (place and fix) and exits with status 2."""

from __future__ import annotations

import argparse
import sys

from hierarchy.cli.checks import (
    MAX_CHAIN_STEPS, MAX_CHAINS, MAX_ITER, MAX_RESTARTS, MAX_SEED, MAX_STEPS, MAX_VALUE, MAX_WORKERS,
    _check_options, _check_outputs,
)
from hierarchy.cli.commands import (
    PROGRESS_SECONDS, cmd_check, cmd_compare, cmd_design, cmd_evaluate, cmd_explain, cmd_fit_world,
    cmd_generate, cmd_import_graph, cmd_phase, cmd_render, cmd_report, cmd_simulate, cmd_sweep,
)
from hierarchy.cli.signals import _interrupted, _show_warning, _Stop, _terminal_safe_output
from hierarchy.errors import HierarchyError

__all__ = [
    "EXIT_USAGE", "EXIT_FAILED", "NUMERIC_COMMANDS", "PROGRESS_SECONDS", "cmd_check",
    "cmd_evaluate", "cmd_simulate", "cmd_design", "cmd_render", "cmd_report", "cmd_explain",
    "cmd_sweep", "cmd_phase", "cmd_compare", "cmd_generate", "cmd_fit_world", "cmd_import_graph",
    "build_parser", "MAX_WORKERS", "MAX_RESTARTS", "MAX_ITER", "MAX_SEED", "MAX_CHAINS",
    "MAX_STEPS", "MAX_CHAIN_STEPS", "MAX_VALUE", "main",
]

EXIT_USAGE = 2
#: A command that could not finish (a failed design, memory ran out).
EXIT_FAILED = 1
#: Commands that do matrix work, and so run BLAS on one thread (see blas.py).
NUMERIC_COMMANDS = {"evaluate", "simulate", "design", "sweep", "phase", "compare", "fit-world"}


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # argparse's own errors: same status, no traceback
        from hierarchy.errors import terminal_safe

        self.print_usage(sys.stderr)
        print(terminal_safe(f"error: {message}"), file=sys.stderr)
        raise SystemExit(EXIT_USAGE)


def _add_report_and_explain(sub) -> None:
    s = sub.add_parser("report", help="one self-contained HTML page about a design",
                       description="Write one HTML page with everything inline: status and objective, the "
                                   "drawing, the tables with their legends, why each silent link is silent, "
                                   "the lower bound and gap when the result has one, the spec text that made "
                                   "the design and the tool versions.")
    s.add_argument("result", metavar="RESULT.json", help="a result of `hierarchy design SPEC --json RESULT.json`")
    s.add_argument("-o", "--output", required=True, metavar="PAGE.html", help="the page to write")
    s.add_argument("--spec", metavar="SPEC", help="the spec the result came from (optional)")
    s.set_defaults(run=cmd_report)
    s = sub.add_parser("explain", help="what every column of the printed tables means",
                       description="Explain the columns of the tables that `design`, `evaluate` and `check` "
                                   "print; give a column name to explain just that one.")
    s.add_argument("word", nargs="*", help="a column, e.g. power, SNR, 'through gain' (default: all)")
    s.set_defaults(run=cmd_explain)


def _study_arguments(s, kind):
    s.add_argument("--out", metavar="BASE", help=f"write BASE.csv, BASE.json and keep finished points in "
                                                 f"BASE.parts/ (default: the spec's name + '-{kind}')")
    s.add_argument("--plot", metavar="PATH", help="picture to write (.png, .svg or .pdf; default BASE.png)")
    s.add_argument("--no-plot", action="store_true", help="write no picture")
    s.add_argument("--workers", type=int, help="parallel chunks: local processes (default min(2, CPUs)); "
                                               "with --dask, chunks sent (default: the cluster's threads)")
    s.add_argument("--dask", metavar="ADDRESS", help="run on an existing Dask cluster, e.g. tcp://host:8786")
    s.add_argument("--cold", action="store_true", help="no warm starts: design every point from scratch")
    s.add_argument("--fresh", action="store_true", help="ignore finished points of an earlier run")
    s.add_argument("--no-progress", action="store_true", help="no progress bar")
    s.add_argument("--restarts", type=int, default=4, help="starting points of a cold design (default 4)")
    s.add_argument("--max-iter", type=int, default=3000, help="solver iteration limit (default 3000)")
    s.add_argument("--seed", type=int, default=0, help="seed of the random starts")
    _force_argument(s)


def _force_argument(s):
    s.add_argument("--force", action="store_true",
                   help="go on even when the estimated memory exceeds what the machine has available")


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="hierarchy", description="Design multi-area predictive circuits under energy limits.")
    p.add_argument("--version", action="version", version=f"hierarchy {__import__('hierarchy').__version__}")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_Parser)

    s = sub.add_parser("check", help="validate a spec and summarise the circuit")
    s.add_argument("spec")
    s.set_defaults(run=cmd_check)

    s = sub.add_parser("evaluate", help="exact stationary scores of a set of gains")
    s.add_argument("spec")
    s.add_argument("--gains", help="gains file (JSON); not needed when the spec pins every gain")
    s.add_argument("--json", metavar="PATH", help="also write the scores as JSON")
    _force_argument(s)
    s.set_defaults(run=cmd_evaluate)

    s = sub.add_parser("simulate", help="Monte-Carlo run beside the exact scores")
    s.add_argument("spec")
    s.add_argument("--gains")
    s.add_argument("--steps", type=int, default=100_000, help="steps per chain (default 100000)")
    s.add_argument("--chains", type=int, default=8, help="independent chains (default 8)")
    s.add_argument("--seed", type=int, default=0)
    s.add_argument("--level", type=float, default=0.99, help="interval level (default 0.99)")
    s.add_argument("--json", metavar="PATH")
    _force_argument(s)
    s.set_defaults(run=cmd_simulate)

    s = sub.add_parser("design", help="optimal gains under the spec's prices or budgets")
    s.add_argument("spec")
    s.add_argument("--json", metavar="PATH", help="write the full result as JSON")
    s.add_argument("--gains", metavar="PATH", help="write the design as a gains file")
    s.add_argument("--plot", metavar="PATH", help="draw the designed circuit (.png, .svg or .pdf)")
    s.add_argument("--start", metavar="PATH", help="warm start from a gains file")
    s.add_argument("--restarts", type=int, default=4, help="starting points tried (default 4)")
    s.add_argument("--max-iter", type=int, default=3000, help="solver iteration limit (default 3000)")
    s.add_argument("--seed", type=int, default=0, help="seed of the random starts")
    s.add_argument("--no-reference", action="store_true",
                   help="with pinned gains, skip designing the all-free circuit for comparison")
    s.add_argument("--no-floor", action="store_true",
                   help="skip the information floor (the lower bound printed beside the design)")
    _force_argument(s)
    s.add_argument("--progress", action="store_true",
                   help=f"a progress line on stderr every {PROGRESS_SECONDS:g} s (default: only on a terminal)")
    s.add_argument("--no-progress", action="store_true", help="no progress lines, even on a terminal")
    s.set_defaults(run=cmd_design)

    s = sub.add_parser("render", help="draw a designed circuit from its result JSON",
                       description="Draw a result file (`hierarchy design SPEC --json RESULT.json`) as a "
                                   "layered diagram: sensors at the bottom, areas by level, link widths by "
                                   "power. The format follows the output's extension: .png, .svg or .pdf.")
    s.add_argument("result", metavar="RESULT.json")
    s.add_argument("-o", "--output", metavar="PATH",
                   help="picture to write (.png, .svg or .pdf); default: the result's name with .png, "
                        "in the same folder")
    s.add_argument("--width-by", choices=("power", "share"), default="power",
                   help="link width proportional to power (default) or to share of budget")
    s.add_argument("--spec", metavar="SPEC", help="the spec the result came from (optional; the result "
                                                  "alone is enough)")
    s.add_argument("--view", choices=("auto", "circuit", "matrix"), default="auto",
                   help="circuit: the layered drawing; matrix: link powers, sender by receiver, ordered by "
                        "level (scales to any size); auto (default): the drawing up to 24 areas, else the matrix")
    s.set_defaults(run=cmd_render)
    _add_report_and_explain(sub)

    s = sub.add_parser("sweep", help="design at every value of one spec value (CSV, JSON, plot)",
                       description="Vary one spec value over a grid and design every point, warm-started from "
                                   "its neighbour. PATH is links[FROM->TO].price or .noise, budgets[NAME].total, "
                                   "areas[NAME].weight or .activity_price, sensors[NAME].noise, "
                                   "world.states[NAME].noise or .dynamics (a noise or dynamics is set to the "
                                   "number times the identity). A group in place of NAME sets several places to the "
                                   "same value: * (all), kind:prediction, kind:residual, from:NODE, to:NODE, e.g. "
                                   "'links[kind:prediction].price' (every top-down price). In a shell, quote the path "
                                   "('links[a->b].price': unquoted, `>` redirects) or write it with no shell "
                                   "characters: links.a:b.price. Rerunning an interrupted sweep resumes it.")
    s.add_argument("spec")
    s.add_argument("path", metavar="PATH", help="the value to vary, e.g. 'links[low->high].price'")
    s.add_argument("--from", dest="start", type=float, required=True, help="first value")
    s.add_argument("--to", dest="stop", type=float, required=True, help="last value")
    s.add_argument("--points", type=int, default=20, help="grid points (default 20)")
    s.add_argument("--log", action="store_true", help="evenly spaced in logarithm")
    s.add_argument("--show", metavar="COLUMNS", help="columns to plot, comma-separated, e.g. "
                                                     "'links[a->s].power,areas[a].error' (default: every link's "
                                                     "power and every area's error)")
    s.add_argument("--log-y", nargs="?", const=True, default=False, metavar="QUANTITIES",
                   help="logarithmic value axes in the plot: alone, every panel; or the quantities to draw "
                        "on a log scale, comma-separated, e.g. --log-y power")
    _study_arguments(s, "sweep")
    s.set_defaults(run=cmd_sweep)

    s = sub.add_parser("phase", help="which links are silent over a grid of two values",
                       description="Design every point of a grid of two spec values (paths as in `sweep`) and "
                                   "map which links are silent, with the boundaries drawn, beside one quantity.")
    s.add_argument("spec")
    s.add_argument("--x", required=True, metavar="PATH", help="value on the horizontal axis")
    s.add_argument("--x-range", required=True, metavar="LO:HI:N", help="N values from LO to HI")
    s.add_argument("--x-log", action="store_true", help="x values evenly spaced in logarithm")
    s.add_argument("--y", required=True, metavar="PATH", help="value on the vertical axis")
    s.add_argument("--y-range", required=True, metavar="LO:HI:N")
    s.add_argument("--y-log", action="store_true")
    s.add_argument("--show", default="objective", metavar="COLUMN",
                   help="quantity mapped beside the silent sets (default objective)")
    _study_arguments(s, "phase")
    s.set_defaults(run=cmd_phase)

    s = sub.add_parser("compare", help="Pareto fronts of several architectures over a range of budgets or prices",
                       description="Design each spec in budget form at every total budget: each spec's budget "
                                   "named `total` (or its only budget) is set to each value; or, with --prices, "
                                   "in price form at every scale of its link prices (each link price times the "
                                   "scale). Draws the fronts (weighted error against energy used) and tells "
                                   "which spec is best where. A spec that holds another plus links it may "
                                   "silence never loses to it.")
    s.add_argument("specs", nargs="+", metavar="SPEC")
    ranges = s.add_mutually_exclusive_group(required=True)
    ranges.add_argument("--budgets", metavar="LO:HI:N", help="N totals from LO to HI")
    ranges.add_argument("--prices", metavar="LO:HI:N",
                        help="instead of budgets: N scales from LO to HI, each multiplying every link price "
                             "of every spec (designs in price form; budgets stay as written)")
    s.add_argument("--log", action="store_true", help="totals (or price scales) evenly spaced in logarithm")
    s.add_argument("--tie", type=float, default=1e-5, metavar="RTOL",
                   help="objectives closer than this (relative) tie (default 1e-5)")
    _study_arguments(s, "compare")
    s.set_defaults(run=cmd_compare)

    s = sub.add_parser("fit-world", help="fit the world (VAR by least squares) to a recording; write its spec section",
                       description="Fit x(t) = c + A_1 x(t-1) + ... + A_p x(t-p) + w(t) by least squares to a "
                                   "recording (CSV with a header row of channel names, or a .npy array of shape "
                                   "steps x channels, whose channels are named 0, 1, ...), with the channels "
                                   "grouped into named world blocks; print the fit quality (stability margin, "
                                   "R^2, whiteness of the residuals) and write the `world:` section of a spec.")
    s.add_argument("data", metavar="DATA", help="the recording (.csv or .npy)")
    s.add_argument("--blocks", nargs="+", metavar="NAME=CH,CH",
                   help="world blocks and their channels, e.g. --blocks upstream=flow station=level_a,level_b "
                        "(default: one block `world` of every channel; channels in no block are not used)")
    s.add_argument("--zero", nargs="+", metavar="SRC:DST",
                   help="couplings fixed at zero: block SRC does not drive block DST (also SRC->DST, quoted); "
                        "`all` for no coupling between blocks")
    s.add_argument("--lags", type=int, default=1, help="lag order p (default 1); p > 1 adds blocks NAME-lagK "
                                                       "holding the past (the state form)")
    s.add_argument("--no-mean", action="store_true", help="fit no constant (the recording is already zero-mean)")
    s.add_argument("--whiteness-lags", type=int, metavar="H",
                   help="lags of the whiteness tests (default min(10, samples/5))")
    s.add_argument("-o", "--output", required=True, metavar="WORLD.yaml", help="the world section to write")
    s.add_argument("--template", metavar="SPEC", help="write this spec with its world replaced by the fit "
                                                     "(every other line kept) instead of the world section alone")
    s.add_argument("--force", action="store_true", help="replace an existing output file")
    s.set_defaults(run=cmd_fit_world)

    s = sub.add_parser("import-graph", help="write a spec skeleton from a directed area graph",
                       description="Read a directed area graph (GraphML, GML, or an edge-list CSV with a header "
                                   "row source,target,...) with feedforward/feedback labels (edge `kind`) or node "
                                   "levels, and optional edge distances and weights, and write a spec skeleton: "
                                   "residual links up, prediction links down, prices from distances, noises from "
                                   "weights, and a world and sensors to edit (docs/spec.md, 'Importing an area "
                                   "graph').")
    s.add_argument("graph", metavar="FILE", help="the graph (.graphml, .gml or .csv)")
    s.add_argument("-o", "--output", required=True, metavar="SPEC.yaml", help="the spec to write")
    s.add_argument("--sensors", metavar="NODE,NODE", help="the nodes that are sensors (default: role sensor or "
                                                          "level 0, else the nodes no feedforward edge enters)")
    s.add_argument("--price", type=float, default=0.05, help="price of a link of mean distance (default 0.05)")
    s.add_argument("--noise", type=float, default=0.02, help="channel noise of a link of mean weight (default 0.02)")
    s.add_argument("--budget", type=float, metavar="TOTAL", help="also put every link in one budget `total`")
    s.add_argument("--force", action="store_true", help="replace an existing output file")
    s.set_defaults(run=cmd_import_graph)

    s = sub.add_parser("generate", help="write a synthetic layered circuit (for tests and benchmarks)",
                       description="A world with one block per level, probes at the bottom, residuals and "
                                   "predictions between neighbouring levels, and a --density fraction of the "
                                   "possible level-skipping and lateral links. The same options give the same file.")
    s.add_argument("--areas", type=int, required=True, help="number of areas")
    s.add_argument("--levels", type=int, required=True, help="number of levels (and of world blocks)")
    s.add_argument("--density", type=float, default=0.2, help="fraction of skip and lateral links (default 0.2)")
    s.add_argument("--seed", type=int, default=0, help="seed of every random choice")
    s.add_argument("--area-dim", type=int, default=2, help="size of each area's state (default 2)")
    s.add_argument("--world-dim", type=int, help="size of the world, a multiple of --levels "
                                                 "(default levels x area-dim)")
    s.add_argument("--max-lag", type=int, default=0, help="areas get lags from 0 to this (default 0)")
    s.add_argument("--relays", type=float, default=0.0, help="fraction of areas above level 1 that are relays")
    s.add_argument("--budgets", action="store_true",
                   help="one budget per level over the links sent from it, instead of prices")
    s.add_argument("-o", "--output", required=True, metavar="PATH", help="spec file to write (YAML)")
    s.set_defaults(run=cmd_generate)
    return p


def main(argv=None) -> int:
    """Entry point of the ``hierarchy`` command."""
    import contextlib
    import os
    import warnings

    from hierarchy import io
    from hierarchy.blas import single_thread

    from hierarchy.errors import terminal_safe

    args = build_parser().parse_args(argv)
    bookmark = io.mark()
    stop = _Stop()
    try:
        _check_options(args)
        _check_outputs(args)
        # (`check`, `render` and `generate` do no matrix work: they skip the
        # BLAS set-up, which would double the time of a `check`.)
        blas = single_thread() if args.command in NUMERIC_COMMANDS else contextlib.nullcontext()
        with warnings.catch_warnings(), blas, _terminal_safe_output(), stop:
            warnings.showwarning = _show_warning
            return args.run(args)
    except HierarchyError as err:
        print(f"error: {err}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print(terminal_safe(_interrupted(args, io.written_since(bookmark), stop.name)), file=sys.stderr)
        return 128 + stop.number
    except MemoryError:
        written = io.written_since(bookmark)
        print(terminal_safe(f"error: `{args.command}` ran out of memory; "
                            + (f"it wrote {', '.join(written)} before" if written else
                               "no file was written (any earlier file is untouched)")
                            + "\n  fix: use a smaller circuit, close other programs, or run on a machine "
                              "with more memory"), file=sys.stderr)
        return EXIT_FAILED
    except RecursionError:
        print(f"error: `{args.command}` met a structure nested too deeply to handle\n"
              "  fix: check the input files (a spec, gains or result is only a few levels deep)", file=sys.stderr)
        return EXIT_USAGE
    except BrokenPipeError:
        # The reader went away (`hierarchy ... | head`): not an error of ours.
        # Point stdout at devnull so the exit flush does not fail again.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
