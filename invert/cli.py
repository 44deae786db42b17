"""Command line: ``invert run | check | synth | report | compare | lvz-test``."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .config import ConfigError
from .data import DataError

CAUTION = ("Estimates come with stated uncertainty; engineering decisions (foundations, site classes, hazard) "
           "follow the local code and the judgement of licensed professionals.")


def _cmd_run(args) -> int:
    from .run import run_inversion

    out = run_inversion(args.config, resume=args.resume, overwrite=args.overwrite, progress=not args.no_progress,
                        quiet=args.quiet, steps=args.steps, report_hint=not args.report)
    if args.report:
        from .report import write_report

        html = write_report(out.folder)
        print(f"Report: {html}")
    return 0 if out.converged or not args.strict else 3


def _cmd_check(args) -> int:
    from .config import load_config, model_words
    from .problem import build_problem
    from .run import data_checks, load_picks

    config = load_config(args.config)
    picks, kept = load_picks(config)
    print(f"Run description {config.path}: '{config.title}', units {config.length_unit} and {config.velocity_unit}")
    if config.prior_template is not None:
        print(f"Prior template: {config.prior_template.resolve()}")
    print(f"Data: {picks.describe()}")
    if kept:
        print(kept)
    for msg in data_checks(picks):
        print(msg)
    problem = build_problem(config, picks)
    print(f"Model: {model_words(config.layers, problem.ndim)}")
    print(problem.prior.describe())
    for name, dist in zip(problem.nuisance_names, problem.nuisance_priors):
        print(f"{name}: {dist.describe(problem.parameter_units()[name])}")
    print(f"Pointwise log likelihood stored per {problem.pointwise_kind}.")
    from .run import classic_start

    reasons: list[str] = []
    velocities: list = []
    try:
        if classic_start(problem, quiet=False, reasons=reasons, velocities=velocities) is None:
            print(f"({reasons[0] if reasons else 'no intercept-time estimate for these data'})")
    except (ValueError, RuntimeError) as exc:
        print(f"(no intercept-time estimate: {exc})")
    from .run import plausibility_warnings, prior_support_error

    warned = plausibility_warnings(problem, velocities[0] if velocities else None)
    for message in warned:
        print(message)
    support = prior_support_error(problem)
    if support:
        raise ConfigError(config.path, "prior", support)
    if warned:
        print("Everything reads, but see the WARNING above before you start the inversion "
              f"(invert run {args.config}).")
        return 0
    print("Everything reads and checks out; start the inversion with: invert run", args.config)
    return 0


def _cmd_synth(args) -> int:
    from .synthetic import make_synthetic

    path = make_synthetic(args.spec)
    print(f"Synthetic picks written to {path}")
    return 0


def _cmd_report(args) -> int:
    from .report import comparison_kind, write_comparison_report, write_report

    if comparison_kind(args.run_dir) is not None:  # a folder of 'invert compare' or 'invert lvz-test'
        html = write_comparison_report(Path(args.run_dir), png=args.png)
        print(f"Report written to {html} (open it in a browser; it works offline)")
        if args.png:
            print(f"Figures written as PNG files to {Path(args.run_dir) / 'figures'}/")
        print(CAUTION)
        return 0
    html = write_report(Path(args.run_dir), png=args.png, bedrock_velocity=args.bedrock_vs,
                        site_classes=args.site_classes)
    print(f"Report written to {html} (open it in a browser; it works offline)")
    if args.png:
        print(f"Figures written as PNG files to {Path(args.run_dir) / 'figures'}/")
    print(CAUTION)
    return 0


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (exposed for the documentation and tests)."""
    p = argparse.ArgumentParser(
        prog="invert",
        description="Bayesian inversion of 1-D layered velocity structure from P and S arrival times. " + CAUTION)
    from . import __version__

    p.add_argument("--version", action="version", version=f"invert {__version__}",
                   help="print the version of invert and exit")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    r = sub.add_parser("run", help="sample the posterior of the run described by CONFIG (TOML)",
                       description="Read the picks and the run description, sample the posterior with several "
                                   "independent emcee ensembles, judge convergence and write the run folder "
                                   "(posterior.nc, summary.csv/json, convergence.txt).")
    r.add_argument("config", help="run description (TOML); see docs/config.md")
    r.add_argument("--resume", action="store_true",
                   help="continue an interrupted run from the checkpoint in its output folder")
    r.add_argument("--overwrite", action="store_true", help="replace the results of an earlier run in the folder")
    r.add_argument("--steps", type=int, default=None, help="steps per ensemble (overrides [sampler] steps)")
    r.add_argument("--report", action="store_true", help="also write the HTML report when done")
    r.add_argument("--strict", action="store_true", help="exit with status 3 if the run did not converge")
    r.add_argument("--quiet", action="store_true", help="print nothing but errors")
    r.add_argument("--no-progress", action="store_true", help="no progress bar")
    r.set_defaults(func=_cmd_run)

    c = sub.add_parser("check", help="read and check the data and run description without sampling",
                       description="Validate CONFIG and its data files, print what would be inverted, the "
                                   "reciprocity and same-offset checks and the priors.")
    c.add_argument("config", help="run description (TOML)")
    c.set_defaults(func=_cmd_check)

    s = sub.add_parser("synth", help="forward-model a true model over a survey into a synthetic pick table",
                       description="Read a synthetic-survey description (TOML: [model], [survey], seed; "
                                   "docs/synthetic.md) and write picks with seeded Gaussian noise.")
    s.add_argument("spec", help="synthetic-survey description (TOML)")
    s.set_defaults(func=_cmd_synth)

    rp = sub.add_parser("report", help="write the HTML and Markdown report of a finished run or comparison",
                        description="Summaries, derived quantities, flags and figures of the run in RUN_DIR as "
                                    "one self-contained HTML file (report.html) and a Markdown summary. Given the "
                                    "folder of 'invert compare' or 'invert lvz-test', the report shows the "
                                    "comparison instead (--png applies; the other options do not).")
    rp.add_argument("run_dir", help="output folder of 'invert run', 'invert compare' or 'invert lvz-test'")
    rp.add_argument("--png", action="store_true", help="also keep every figure as a PNG file in RUN_DIR/figures")
    rp.add_argument("--bedrock-vs", type=float, default=760.0, metavar="VS",
                    help="S velocity [m/s] whose depth is reported as depth to bedrock-like material (default 760)")
    rp.add_argument("--site-classes", default="ASCE7-16", choices=["ASCE7-16", "EC8-2004"],
                    help="site-class band edges for Vs30 (default ASCE7-16: 1500/760/360/180 m/s); "
                         "always check the code that applies locally")
    rp.set_defaults(func=_cmd_report)

    from .compare import add_commands

    add_commands(sub)  # `invert compare` and `invert lvz-test` (docs/evidence.md)
    return p


def main(argv=None) -> int:
    """Entry point of the ``invert`` command."""
    args = build_parser().parse_args(argv)
    try:
        return args.func(args)
    except (ConfigError, DataError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except FileExistsError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except FileNotFoundError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except ValueError as exc:
        if args.command == "report":
            print(f"error: {exc}", file=sys.stderr)
            return 2
        if args.command == "run" and "refusing to resume" in str(exc):
            print(f"error: {exc}. Start the run again with --overwrite, or set another [output] folder",
                  file=sys.stderr)
            return 2
        raise
    except KeyboardInterrupt:
        print("\ninterrupted: every completed step is in the checkpoint; continue with --resume", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
