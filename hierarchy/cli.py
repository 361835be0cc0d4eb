"""Command line: a thin layer over the Python API. Every user error prints
one clear message (place and fix) and exits with status 2."""

from __future__ import annotations

import argparse
import sys

from .errors import HierarchyError, InputError

EXIT_USAGE = 2


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # argparse's own errors: same status, no traceback
        self.print_usage(sys.stderr)
        print(f"error: {message}", file=sys.stderr)
        raise SystemExit(EXIT_USAGE)


def _load(path):
    from . import load

    return load(path)


def _gains(circuit, path):
    from .gains import load_gains

    return None if path is None else load_gains(path, circuit.spec)


def _print_warnings(circuit):
    for w in circuit.warnings:
        print(f"warning: {w}", file=sys.stderr)


def cmd_check(args) -> int:
    from .circuit import by_level

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
    budgeted = {lid: b.name for b in spec.budgets for lid in b.links}
    for l in spec.links:
        pins = f", pinned {'+'.join(sorted(l.pin))}" if l.pin else ""
        cost = []
        if l.price:
            cost.append(f"price {l.price:g}")
        if l.id in budgeted:
            cost.append(f"budget {budgeted[l.id]}")
        print(f"link {l.id}: {l.kind}, {l.dim}-dim, noise power {l.noise.trace():.4g}"
              + (", " + ", ".join(cost) if cost else "") + pins)
    for b in spec.budgets:
        print(f"budget {b.name}: total {b.total:g} over {len(b.links)} link(s)")
    _print_warnings(c)
    return 0


def cmd_evaluate(args) -> int:
    from .evaluate import evaluate
    from .gains import with_pins
    from .results import scores_text, scores_to_dict, write_json

    c = _load(args.spec)
    gains = with_pins(c.spec, _gains(c, args.gains))
    scores = evaluate(c.spec, gains)
    print(scores_text(c.spec, scores, gains))
    if args.json:
        write_json(args.json, scores_to_dict(c.spec, scores, gains))
        print(f"\nwrote {args.json}")
    _print_warnings(c)
    return 0


def cmd_simulate(args) -> int:
    from .evaluate import evaluate
    from .results import fmt, table, write_json
    from .simulate import compare, simulate

    c = _load(args.spec)
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
    from .design import Options
    from .gains import save_gains
    from .results import result_text, write_json

    c = _load(args.spec)
    start = _gains(c, args.start)
    if args.plot:  # a bad picture path is refused before the design runs
        from .render import check_path

        check_path(args.plot)
    opts = Options(restarts=args.restarts, max_iter=args.max_iter, seed=args.seed)
    result = c.design(opts, start=start, compare_unpinned=not args.no_reference)
    print(result_text(result))
    if args.json:
        write_json(args.json, result.to_dict())
        print(f"\nwrote {args.json}")
    if args.gains:
        note = f"design of '{c.spec.name}' ({result.form} form, {result.status})"
        save_gains(args.gains, result.gains, c.spec, note=note)
        print(f"wrote {args.gains}")
    if args.plot:
        from .render import save_circuit

        save_circuit(result, args.plot)
        print(f"wrote {args.plot}")
    _print_warnings(c)
    return 0 if result.status != "failed" else 1


def cmd_render(args) -> int:
    import os

    from .render import read_result, save_circuit

    out = args.output or os.path.splitext(args.result)[0] + ".png"
    data = read_result(args.result)
    spec = _load(args.spec).spec if args.spec else None
    save_circuit(data, out, spec=spec, width_by=args.width_by)
    print(f"wrote {out}")
    return 0


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
    s.set_defaults(run=cmd_evaluate)

    s = sub.add_parser("simulate", help="Monte-Carlo run beside the exact scores")
    s.add_argument("spec")
    s.add_argument("--gains")
    s.add_argument("--steps", type=int, default=100_000, help="steps per chain (default 100000)")
    s.add_argument("--chains", type=int, default=8, help="independent chains (default 8)")
    s.add_argument("--seed", type=int, default=0)
    s.add_argument("--level", type=float, default=0.99, help="interval level (default 0.99)")
    s.add_argument("--json", metavar="PATH")
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
    s.set_defaults(run=cmd_render)
    return p


def main(argv=None) -> int:
    """Entry point of the ``hierarchy`` command."""
    args = build_parser().parse_args(argv)
    try:
        return args.run(args)
    except HierarchyError as err:
        print(f"error: {err}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print("interrupted: no output file was left half-written", file=sys.stderr)
        return 130
