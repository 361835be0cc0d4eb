"""Command line: a thin layer over the Python API. Every user error prints
one clear message (place and fix) and exits with status 2."""

from __future__ import annotations

import argparse
import contextlib
import sys

from hierarchy.errors import HierarchyError, InputError

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


def _load(path):
    from hierarchy import load

    return load(path)


def _gains(circuit, path):
    from hierarchy.loop.gains import load_gains

    return None if path is None else load_gains(path, circuit.spec)


def _print_warnings(circuit):
    for w in circuit.warnings:
        print(f"warning: {w}", file=sys.stderr)


#: Seconds between progress lines of a long single design.
PROGRESS_SECONDS = 5.0


def _check_resources(args, specs, evaluate_only=False, processes=1) -> None:
    """Refuse (unless ``--force``) work beyond the machine's memory; say on
    stderr when one evaluation alone is slow, before the work starts."""
    from hierarchy.resources import check_memory, estimate, fmt_bytes, fmt_seconds

    needs = [estimate(spec, evaluate_only) for spec in specs]
    worst = max(needs, key=lambda n: n.memory)
    if not getattr(args, "force", False):
        check_memory(worst, processes)
    slow = max(n.evaluation_seconds for n in needs)
    if not evaluate_only and slow * 100 > 60:
        print(f"note: one evaluation of this circuit takes about {fmt_seconds(slow)} and needs about "
              f"{fmt_bytes(worst.memory)}; a design makes hundreds (one to a few per iteration, at most "
              f"{args.max_iter} iterations), so this may take {fmt_seconds(100 * slow)} or more",
              file=sys.stderr)


class _DesignProgress:
    """A line on stderr every :data:`PROGRESS_SECONDS` while a design runs:
    evaluations so far and time taken. Only when ``enabled``."""

    def __init__(self, enabled: bool, label: str):
        import threading

        self.enabled, self.label = enabled, label
        self._done = threading.Event()
        self._thread = None

    def __enter__(self):
        import threading

        if self.enabled:
            self._thread = threading.Thread(target=self._run, daemon=True, name="hierarchy-progress")
            self._thread.start()
        return self

    def _run(self):
        import time

        from hierarchy.design.problem import EVALUATIONS

        t0, n0 = time.monotonic(), EVALUATIONS[0]
        while not self._done.wait(PROGRESS_SECONDS):
            print(f"{self.label}: {EVALUATIONS[0] - n0} evaluations, {time.monotonic() - t0:.0f} s so far",
                  file=sys.stderr, flush=True)

    def __exit__(self, *exc):
        self._done.set()
        if self._thread is not None:
            self._thread.join()
        return False


def _progress_wanted(args) -> bool:
    return bool(getattr(args, "progress", False)) or (sys.stderr.isatty() and not getattr(args, "no_progress", False))


def cmd_check(args) -> int:
    from hierarchy.graph import by_level

    c = _load(args.spec)
    spec = c.spec
    world = spec.world
    print(f"spec '{spec.name}' is valid")
    print(f"world: {world.dim} state(s) in {len(world.states)} block(s): "
          + ", ".join(f"{b.name}[{b.dim}]" for b in world.states))
    for level, nodes in by_level(c.graph):
        label = f"level {level}" if level is not None else "unreached"
        desc = []
        for n in nodes:
            d = c.graph.nodes[n]
            if d["role"] == "sensor":
                desc.append(f"{n} (sensor, {d['dim']}-dim, sees {'+'.join(d['observes'])})")
            else:
                what = f"tracks {'+'.join(d['tracks'])}, lag {d['lag']}" if d["tracks"] else "relay"
                desc.append(f"{n} (area, {d['dim']}-dim, {what})")
        print(f"{label}: " + "; ".join(desc))
    budgeted = {}
    for b in spec.budgets:
        for lid in b.links:
            extra = [f"cost {b.weight(lid):g}"] if b.weight(lid) != 1 else []
            extra += [f"cap {b.caps[lid]:g}"] if lid in b.caps else []
            budgeted.setdefault(lid, []).append(b.name + (f" ({', '.join(extra)})" if extra else ""))
    for l in spec.links:
        pins = f", pinned {'+'.join(sorted(l.pin))}" if l.pin else ""
        cost = []
        if l.price:
            cost.append(f"price {l.price:g}")
        if l.id in budgeted:
            cost.append(("budget " if len(budgeted[l.id]) == 1 else "budgets ") + ", ".join(budgeted[l.id]))
        delay = f", delay {l.delay} steps" if l.delay > 1 else ""
        print(f"link {l.id}: {l.kind}, {l.dim}-dim, noise power {l.noise.trace():.4g}"
              + (", " + ", ".join(cost) if cost else "") + delay + pins)
    for b in spec.budgets:
        extra = [f"{len(b.costs)} cost weight(s)"] if b.costs else []
        extra += [f"{len(b.caps)} cap(s)"] if b.caps else []
        extra += ["activity of " + ", ".join(f"{a}" + (f" x{w:g}" if w != 1 else "") for a, w in b.activity.items())
                  ] if b.activity else []
        print(f"budget {b.name}: total {b.total:g} over {len(b.links)} link(s)"
              + (", " + ", ".join(extra) if extra else "") + (" (switches them off)" if b.total == 0 else ""))
    if spec.units is not None:
        from hierarchy.spec.units import describe

        print(f"units: {describe(spec.units)}")
    _print_warnings(c)
    return 0


def cmd_evaluate(args) -> int:
    from hierarchy.loop.evaluate import evaluate
    from hierarchy.loop.gains import with_pins
    from hierarchy.report.results import scores_text, scores_to_dict, write_json

    c = _load(args.spec)
    _check_resources(args, [c.spec], evaluate_only=True)
    gains = with_pins(c.spec, _gains(c, args.gains))
    scores = evaluate(c.spec, gains)
    print(scores_text(c.spec, scores, gains))
    if args.json:
        write_json(args.json, scores_to_dict(c.spec, scores, gains))
        print(f"\nwrote {args.json}")
    _print_warnings(c)
    return 0


def cmd_simulate(args) -> int:
    from hierarchy.loop.evaluate import evaluate
    from hierarchy.report.results import fmt, table, write_json
    from hierarchy.loop.simulate import compare, simulate

    c = _load(args.spec)
    _check_resources(args, [c.spec], evaluate_only=True)
    gains = _gains(c, args.gains)
    if args.steps < 100 or args.chains < 2:
        raise InputError("too few steps or chains for an interval", place="--steps/--chains",
                         fix="use at least 100 steps and 2 chains")
    sim = simulate(c.spec, gains, steps=args.steps, chains=args.chains, seed=args.seed, level=args.level)
    scores = evaluate(c.spec, gains)
    rows = compare(scores, sim)
    print(table(["quantity", "exact", "simulated", f"{100 * args.level:g}% interval", "inside"],
                [[r[0], fmt(r[1]), fmt(r[2]), f"[{fmt(r[3])}, {fmt(r[4])}]", "yes" if r[5] else "NO"]
                 for r in rows]))
    print(f"\n{sim.chains} chains x {sim.steps} steps (burn-in {sim.burn_in}), "
          f"{sim.batches} batch means per chain, seed {sim.seed}")
    for w in sim.warnings:
        print(f"warning: {w}", file=sys.stderr)
    if args.json:
        write_json(args.json, {"exact": scores.to_dict(), "simulated": sim.to_dict()})
        print(f"wrote {args.json}")
    _print_warnings(c)
    return 0


def cmd_design(args) -> int:
    from hierarchy.design import Options
    from hierarchy.loop.gains import save_gains
    from hierarchy.report.results import result_text, write_json

    c = _load(args.spec)
    start = _gains(c, args.start)
    if args.plot:  # a bad picture path is refused before the design runs
        from hierarchy.report.drawing import check_path

        check_path(args.plot)
    _check_resources(args, [c.spec])
    opts = Options(restarts=args.restarts, max_iter=args.max_iter, seed=args.seed)
    with _DesignProgress(_progress_wanted(args), "design"):
        result = c.design(opts, start=start, compare_unpinned=not args.no_reference, floor=not args.no_floor)
    print(result_text(result))
    if args.json:
        write_json(args.json, result.to_dict())
        print(f"\nwrote {args.json}")
    if args.gains:
        note = f"design of '{c.spec.name}' ({result.form} form, {result.status})"
        save_gains(args.gains, result.gains, c.spec, note=note)
        print(f"wrote {args.gains}")
    if args.plot:
        from hierarchy.report.drawing import save_circuit

        save_circuit(result, args.plot)
        print(f"wrote {args.plot}")
    _print_warnings(c)
    return 0 if result.status != "failed" else 1


def cmd_render(args) -> int:
    import os

    from hierarchy.report.drawing import read_result, save_circuit

    out = _render_output(args)
    data = read_result(args.result)
    spec = _load(args.spec).spec if args.spec else None
    save_circuit(data, out, spec=spec, width_by=args.width_by, view=args.view)
    print(f"wrote {out}")
    return 0


# -- `report` and `explain` (pictures and words, issue 15) ---------------------


def cmd_report(args) -> int:
    from hierarchy.report.drawing import read_result
    from hierarchy.report.page import check_report_path, save_report

    check_report_path(args.output)
    data = read_result(args.result)
    spec = _load(args.spec).spec if args.spec else None
    save_report(data, args.output, spec=spec)
    print(f"wrote {args.output}")
    return 0


def cmd_explain(args) -> int:
    from hierarchy.report.results import explain_text

    print(explain_text(" ".join(args.word) if args.word else None))
    return 0


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


def _study_setup(args, specs, kind, show=(), coords=()):
    """Everything a study checks before it designs anything: designer
    options, output base, plot path and the columns asked for."""
    import os

    from hierarchy.design import Options
    from hierarchy.report.plots import check_plot_path
    from hierarchy.studies import check_columns, output_base

    base = output_base(args.out or f"{os.path.splitext(os.path.basename(args.specs[0]))[0]}-{kind}")
    plot = None if args.no_plot else (args.plot or f"{base}.png")
    if plot:
        check_plot_path(plot)
    check_columns(specs, show, coords)
    _check_resources(args, specs, processes=1 if args.dask else (args.workers or 1))
    return Options(restarts=args.restarts, max_iter=args.max_iter, seed=args.seed), base, plot


def _study_finish(args, study, base, plot, show=None, kinds=None) -> int:
    from hierarchy.report.plots import save_study_plot
    from hierarchy.studies import study_text

    print(study_text(study, show))
    print(f"\nwrote {base}.csv and {base}.json (finished points kept in {base}.parts/)")
    if plot:
        save_study_plot(study, plot, show=show or None, log_y=getattr(args, "log_y", False), kinds=kinds)
        print(f"wrote {plot}")
    return 1 if any(r.get("status") == "failed" for r in study.rows) else 0


def _run_kw(args) -> dict:
    return {"workers": args.workers, "dask": args.dask, "warm": not args.cold,
            "progress": not args.no_progress, "fresh": args.fresh}


def cmd_sweep(args) -> int:
    from hierarchy.studies import grid, parse_path, parse_show, sweep

    args.specs = [args.spec]
    spec = _load(args.spec).spec
    parse_path(spec, args.path)
    show = parse_show(args.show)
    from hierarchy.report.plots import check_log_y

    check_log_y(args.log_y)
    opts, base, plot = _study_setup(args, [spec], "sweep", show, [args.path])
    values = grid(args.start, args.stop, args.points, args.log)
    study = sweep(spec, args.path, values, opts, log=args.log, output=base, **_run_kw(args))
    return _study_finish(args, study, base, plot, show, kinds={l.id: l.kind for l in spec.links})


def cmd_phase(args) -> int:
    from hierarchy.studies import grid, parse_path, parse_range, phase_map

    args.specs = [args.spec]
    spec = _load(args.spec).spec
    parse_path(spec, args.x)
    parse_path(spec, args.y)
    opts, base, plot = _study_setup(args, [spec], "phase", [args.show], [args.x, args.y])
    xs = grid(*parse_range(args.x_range, "--x-range"), log=args.x_log)
    ys = grid(*parse_range(args.y_range, "--y-range"), log=args.y_log)
    study = phase_map(spec, args.x, xs, args.y, ys, opts, x_log=args.x_log, y_log=args.y_log, output=base,
                      **_run_kw(args))
    return _study_finish(args, study, base, plot, [args.show])


def cmd_compare(args) -> int:
    from hierarchy.studies import compare, grid, parse_range

    specs = [_load(path).spec for path in args.specs]
    opts, base, plot = _study_setup(args, specs, "compare")
    if args.prices is not None:
        study = compare(specs, None, opts, prices=grid(*parse_range(args.prices, "--prices"), log=args.log),
                        log=args.log, output=base, tie_rtol=args.tie, **_run_kw(args))
    else:
        totals = grid(*parse_range(args.budgets, "--budgets"), log=args.log)
        study = compare(specs, totals, opts, log=args.log, output=base, tie_rtol=args.tie, **_run_kw(args))
    return _study_finish(args, study, base, plot)


def cmd_generate(args) -> int:
    from hierarchy.spec.generate import write_spec
    from hierarchy.spec import load_spec

    write_spec(args.output, areas=args.areas, levels=args.levels, density=args.density, seed=args.seed,
               area_dim=args.area_dim, world_dim=args.world_dim, max_lag=args.max_lag, relays=args.relays,
               budgets=args.budgets)
    spec = load_spec(args.output)
    print(f"wrote {args.output}: {len(spec.areas)} areas, {len(spec.sensors)} sensors, {len(spec.links)} links, "
          f"world of {spec.world.dim} states" + (f", {len(spec.budgets)} budgets" if spec.budgets else ""))
    return 0


def cmd_fit_world(args) -> int:
    from hierarchy.spec.fitworld import (
        check_world_output,
        fit_text,
        fit_world,
        load_recording,
        parse_blocks,
        parse_zeros,
        write_world,
    )

    check_world_output(args.output, args.force)
    rec = load_recording(args.data)
    blocks = parse_blocks(args.blocks, rec.channels)
    zeros = parse_zeros(args.zero, blocks)
    fit = fit_world(rec, blocks, lags=args.lags, zeros=zeros, mean=not args.no_mean,
                    whiteness_lags=args.whiteness_lags)
    print(fit_text(fit))
    write_world(fit, args.output, force=args.force, template=args.template)
    print(f"\nwrote {args.output} " + (f"({args.template} with the fitted world)" if args.template
                                       else "(the world: section of a spec)"))
    return 0


def cmd_import_graph(args) -> int:
    from hierarchy.spec.importgraph import read_area_graph, skeleton_yaml, write_skeleton
    from hierarchy.io import refuse_existing
    from hierarchy.spec import parse_spec

    refuse_existing(args.output, args.force)
    graph = read_area_graph(args.graph, sensors=args.sensors.split(",") if args.sensors else None)
    text = skeleton_yaml(graph, price=args.price, noise=args.noise, budget=args.budget)
    spec = parse_spec(text)  # what is written must be a valid spec
    write_skeleton(text, args.output, force=args.force)
    kinds = {}
    for l in spec.links:
        kinds[l.kind] = kinds.get(l.kind, 0) + 1
    print(f"read {graph.path}: {len(graph.sensors)} sensor(s) ({', '.join(graph.sensors)}), "
          f"{len(spec.areas)} area(s), " + ", ".join(f"{v} {k} link(s)" for k, v in sorted(kinds.items())))
    print(f"wrote {args.output}: a spec skeleton; edit its world, sensors and targets, then "
          f"`hierarchy check {args.output}`")
    return 0


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


class _Stop:
    """While a command runs, SIGTERM and SIGHUP stop it as Ctrl-C does
    (finished study points kept, outputs whole or untouched, one message);
    the exit status is then 128 + the signal's number, as a shell reports.
    Later signals of the kind are ignored while the command cleans up."""

    def __init__(self):
        import signal

        self.name, self.number = "Ctrl-C", int(signal.SIGINT)
        self._saved = {}

    def __enter__(self):
        import signal
        import threading

        if threading.current_thread() is threading.main_thread():  # only there can Python handle signals
            for sig in (getattr(signal, n) for n in ("SIGTERM", "SIGHUP") if hasattr(signal, n)):
                self._saved[sig] = signal.signal(sig, self._handle)
        return self

    def _handle(self, signum, frame):
        import signal

        if self.number != int(signal.SIGINT):
            return  # already stopping
        self.name, self.number = signal.Signals(signum).name, int(signum)
        raise KeyboardInterrupt

    def __exit__(self, *exc):
        import signal

        for sig, handler in self._saved.items():
            signal.signal(sig, handler)
        return False


def _interrupted(args, written: list, cause="Ctrl-C") -> str:
    """Where things stand after Ctrl-C (or the signal ``cause``): what was
    written, what was not."""
    def listing(paths):
        return ", ".join(paths[:5]) + (f" and {len(paths) - 5} more" if len(paths) > 5 else "")

    done = set(written)
    pending = [p for p in _planned_outputs(args) if p not in done]
    text = f"interrupted ({cause}) during `{args.command}`: "
    text += f"wrote {listing(written)} before the interrupt" if written else "no file was written"
    if pending:
        text += f"; not written: {listing(pending)} (any earlier file there is untouched)"
    return text + ". No file is ever left half-written."


class _TerminalSafe:
    """A text stream that shows, rather than passes on, every character a
    terminal would obey (see :func:`hierarchy.errors.terminal_safe`): names
    in a spec reach every table and message, and must not recolour, move
    the cursor or retitle the user's terminal. ``keep`` lists the controls
    let through (line breaks; on stderr also ``\r`` for the progress bar)."""

    def __init__(self, stream, keep):
        self._stream = stream
        self._keep = keep

    def write(self, text):
        from hierarchy.errors import terminal_safe

        return self._stream.write(terminal_safe(text, self._keep))

    def __getattr__(self, name):  # flush, fileno, isatty, encoding, ...
        return getattr(self._stream, name)


@contextlib.contextmanager
def _terminal_safe_output():
    saved = sys.stdout, sys.stderr
    sys.stdout, sys.stderr = _TerminalSafe(saved[0], "\n\t"), _TerminalSafe(saved[1], "\n\t\r")
    try:
        yield
    finally:
        sys.stdout, sys.stderr = saved


def _show_warning(message, category, filename, lineno, file=None, line=None):
    """Python warnings (numerical ones from numpy or scipy) as one plain line."""
    print(f"warning: {category.__name__}: {' '.join(str(message).split())}", file=sys.stderr)


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
