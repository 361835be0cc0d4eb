"""What each subcommand of ``hierarchy`` does: read its inputs, call the
stages of the package, print and write the results. Parsing the command
line and checking its options is :mod:`hierarchy.cli`'s."""

from __future__ import annotations

import sys

from hierarchy.cli.checks import _render_output
from hierarchy.errors import InputError

__all__ = [
    "PROGRESS_SECONDS", "cmd_check", "cmd_evaluate", "cmd_simulate", "cmd_design", "cmd_render",
    "cmd_report", "cmd_explain", "cmd_sweep", "cmd_phase", "cmd_compare", "cmd_generate",
    "cmd_fit_world", "cmd_import_graph",
]

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
