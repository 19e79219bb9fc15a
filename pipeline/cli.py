"""Command line: ``fairgauge build CONFIG`` and ``fairgauge demo``.

The only module that prints errors and chooses exit codes; everything else raises.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from pipeline import __version__
from pipeline.config import family_for
from pipeline.errors import FairgaugeError


class ConsoleReporter:
    """Progress lines with elapsed time, and warnings counted for the closing summary."""

    def __init__(self) -> None:
        self.start = time.perf_counter()
        self.warnings = 0

    def stage(self, text: str) -> None:
        print(f"[{time.perf_counter() - self.start:6.1f}s] {text}", flush=True)

    def warn(self, text: str) -> None:
        self.warnings += 1
        print(f"[{time.perf_counter() - self.start:6.1f}s] WARNING {text}", flush=True)


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="fairgauge",
        description="Risk-adjusted, shrinkage-based unit reports as a static website.",
    )
    parser.add_argument("--version", action="version", version=f"fairgauge {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--strict", action="store_true", help="treat warnings as errors")
    common.add_argument(
        "--renderer", choices=["auto", "quarto", "builtin"], help="override [cycle].renderer"
    )
    common.add_argument(
        "--refit",
        action="store_true",
        help="ignore cached fits and figures; fit and draw everything again",
    )
    build = sub.add_parser(
        "build", parents=[common], help="run the reporting cycle described by a config file"
    )
    build.add_argument("config", type=Path, help="cycle config (TOML)")
    stage = sub.add_parser(
        "stage",
        parents=[common],
        help="run the cycle into [review].staging with a review summary and confidential unit "
        "previews; publish nothing",
    )
    stage.add_argument("config", type=Path, help="cycle config (TOML)")
    sign = sub.add_parser("sign-off", help="record sign-off of the staged build")
    sign.add_argument("config", type=Path, help="cycle config (TOML)")
    sign.add_argument(
        "--signer",
        nargs=2,
        action="append",
        metavar=("NAME", "ROLE"),
        required=True,
        help="who signs off and in what role (repeat for several people)",
    )
    sign.add_argument("--date", default=None, help="date of the sign-off, YYYY-MM-DD (today)")
    sign.add_argument("--note", default="", help="optional note kept with the sign-off")
    promote = sub.add_parser(
        "promote", help="publish the signed-off staged build exactly as it was reviewed"
    )
    promote.add_argument("config", type=Path, help="cycle config (TOML)")
    check = sub.add_parser("check", help="check a config and its data without fitting anything")
    check.add_argument("config", type=Path, help="cycle config (TOML)")
    _demo_parser(
        sub.add_parser("demo", parents=[common], help="invent a network, then build its site")
    )
    return parser


def _demo_parser(demo: argparse.ArgumentParser) -> None:
    demo.add_argument(
        "--folder",
        type=Path,
        default=Path("demo-cycle"),
        help="where the invented inputs and config go (default: demo-cycle)",
    )
    demo.add_argument(
        "--site",
        type=Path,
        default=Path("site/demo"),
        help="where the site goes (default: site/demo)",
    )
    demo.add_argument(
        "--seed", type=int, default=7, help="seed of the invented network (default: 7)"
    )
    demo.add_argument(
        "--units",
        type=int,
        default=44,
        help="number of invented units, 30-60 recommended (default: 44)",
    )


def _summary(summary, reporter: ConsoleReporter) -> None:
    reported = {
        r.measure.key: int((r.table["status"] == "reported").sum()) for r in summary.results
    }
    print(f"\nfairgauge: cycle finished in {summary.seconds:.1f} s")
    print(f"  units:    {summary.units} ({summary.patients:,} patient rows)")
    print(f"  measures: {', '.join(f'{k} ({n} units reported)' for k, n in reported.items())}")
    print(f"  warnings: {reporter.warnings}")
    print(f"  renderer: {summary.renderer.name}")
    print(f"  site:     {(summary.site / 'index.html').resolve()}")


def hidden_values(config, cohort) -> list[str]:
    """Per measure, how many values the disclosure rules will hide (before patients with missing
    risk factors are left out)."""
    from pipeline.disclosure import planned

    lines = []
    for m in config.measures:
        summary = (cohort.unit_tables or {}).get(m.key)
        if summary is not None:
            cases, observed = summary["cases"], summary["observed"]
        else:
            grouped = cohort.rows.groupby(cohort.unit_column)[m.outcome]
            cases, observed = grouped.size(), grouped.sum()
        n = planned(
            cases,
            observed,
            cohort.units.index,
            family_for(m).counts_events,
            config.reporting.hide_counts_below,
            config.reporting.minimum_cases,
        )
        lines.append(
            f"{m.key}: {n['units']} unit(s) hidden (too few cases or withheld); {n['small']} "
            "small count(s) shown as a "
            f"range and {n['protects']} more count(s) hidden to protect them"
        )
    return lines


def _review_command(args, config, reporter: ConsoleReporter) -> int:
    """``stage``, ``sign-off`` and ``promote``: each prints what it did and where."""
    from datetime import date

    from pipeline.staging.promote import promote, sign_off
    from pipeline.staging.stage import stage_cycle

    staging = config.review.staging
    if args.command == "stage":
        staged = stage_cycle(
            config, reporter, strict=args.strict, renderer=args.renderer, no_cache=args.refit
        )
        _summary(staged.run, reporter)
        print(f"  staged:   {staging} (not published; the history is unchanged)")
        print(f"  review:   {(staging / 'review' / 'index.html').resolve()}")
        print(f"  previews: {staged.previews} in {(staging / 'previews').resolve()} (confidential)")
        print(f"  sha256:   {staged.digest}")
        return 0
    if args.command == "sign-off":
        entry = sign_off(
            config,
            [tuple(s) for s in args.signer],
            args.date or date.today().isoformat(),
            args.note,
        )
        who = "; ".join(f"{s['name']} ({s['role']})" for s in entry["signers"])
        print(
            f"fairgauge: sign-off recorded for the build staged in {staging}: {who}, "
            f"{entry['date']}"
        )
        print(f"  sha256:   {entry['site_sha256']}")
        return 0
    done = promote(config)
    print(f"fairgauge: published the signed-off build to {done.site.resolve()}")
    print(f"  sha256:   {done.digest} (recorded in fairgauge-signoff.json)")
    who = "; ".join(f"{s['name']} ({s['role']})" for s in done.signers)
    print(f"  signed:   {who}")
    return 0


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    reporter = ConsoleReporter()
    try:
        from pipeline.config import load_config
        from pipeline.cycle import run_cycle

        if args.command == "check":
            from pipeline.inputs.data import load_cohort

            config = load_config(args.config)
            cohort = load_cohort(config)
            for w in cohort.warnings:
                reporter.warn(w)
            with_cases = cohort.units_with_cases()
            print(
                f"fairgauge: check passed: {len(cohort.rows):,} patient rows, "
                f"{len(with_cases)} units with cases, "
                f"{len(cohort.units)} in the unit table; {len(cohort.warnings)} warning(s). "
                "Nothing was fitted."
            )
            for line in hidden_values(config, cohort):
                print(f"fairgauge: {line}")
            return 0
        if args.command in ("stage", "sign-off", "promote"):
            return _review_command(args, load_config(args.config), reporter)
        if args.command == "demo":
            from pipeline.demo import write_demo

            reporter.stage(
                f"inventing a network of {args.units} units in {args.folder}/ (all data made up)"
            )
            files = write_demo(args.folder, args.site, seed=args.seed, n_units=args.units)
            config_path = files.config
        else:
            config_path = args.config
        config = load_config(config_path)
        summary = run_cycle(
            config, reporter, strict=args.strict, renderer=args.renderer, no_cache=args.refit
        )
    except FairgaugeError as exc:
        print(f"fairgauge: ERROR {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("fairgauge: interrupted; the previous site was left as it was.", file=sys.stderr)
        return 130
    _summary(summary, reporter)
    return 0


if __name__ == "__main__":
    sys.exit(main())
