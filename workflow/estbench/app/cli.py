"""The ``estbench`` command: init, run, check, status, plan, report, query, new.

Every verb that works on a study takes the study file as its first positional
argument; without one it uses ``./study.yaml`` (or the one study file in the
folder) and says so, and ``--demo`` picks the bundled demo study. User errors
print one clear line per problem and exit with status 2; bugs keep their
traceback.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

from estbench import __version__
from estbench.app.locate import locate_study
from estbench.core.errors import (
    EXIT_FAILED_REPLICATES,
    EXIT_INTERRUPTED,
    EXIT_RUN_FAILED,
    EXIT_USER_ERROR,
    UserError,
    entry_point,
)

#: Seed blocks per scenario below which `check` warns that jackknife MCSEs are rough
#: (K - 1 degrees of freedom; the README's advice of at least 20 is common practice).
JACKKNIFE_MIN_BLOCKS = 20
#: Snakemake options after `--` that only show what would run.
DRY_RUN_FLAGS = ("-n", "--dry-run", "--dryrun")
#: Snakemake options after `--` that stop before the report.
PARTIAL_RUN_FLAGS = ("--until", "-U", "--omit-from", "-O")


def _study_arg(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("study", nargs="?", type=Path, default=None,
                        help="study file (default: ./study.yaml, or the one study file in this folder)")
    parser.add_argument("--demo", action="store_true",
                        help="use the demo study bundled with estbench (a water-testing lab)")


def _load(args):
    """The study the verb works on, validated."""
    from estbench.study.load import load_study
    args.study = locate_study(args.study, args.demo, say=lambda text: print(text, file=sys.stderr))
    return load_study(args.study)


def cmd_check(args) -> int:
    study = _load(args)
    print(f"study {study.name!r} is valid: {len(study.dgms)} DGM(s), {len(study.scenarios)} scenario(s), "
          f"{len(study.estimators)} estimator(s), {study.replicates_run} replicates per scenario "
          f"({study.n_blocks} seed block(s) of {study.block_size}), {len(study.jobs)} simulation job(s), "
          f"{len(study.pieces) * len(study.estimators)} shard(s)")
    if study.n_blocks < JACKKNIFE_MIN_BLOCKS:
        print(f"estbench: warning: each scenario has {study.n_blocks} seed block(s); the jackknife MCSEs "
              f"(rmse, relative_mse) need at least {JACKKNIFE_MIN_BLOCKS}: lower `block_size` or raise "
              f"`replicates`", file=sys.stderr)
    return 0


def _profile_args(profile: str | None) -> list[str]:
    """``--profile`` for Snakemake: a folder, or the name of a bundled profile."""
    if profile is None:
        return []
    from estbench.core.bundled import PROFILES_DIR
    for folder in (Path(profile), PROFILES_DIR / profile):
        if (folder / "config.yaml").is_file():
            return ["--profile", str(folder.resolve())]
    names = ", ".join(sorted(p.name for p in PROFILES_DIR.iterdir() if (p / "config.yaml").is_file()))
    raise UserError(f"`--profile`: {profile!r} is neither a folder with a config.yaml nor one of the "
                    f"profiles bundled with estbench ({names})")


def cmd_run(args) -> int:
    from estbench.app.precision import run_until_precise
    from estbench.app.runner import run_study
    from estbench.study.allocation import with_allocation
    if args.cores < 1:
        raise UserError(f"`--cores` must be a positive integer, got {args.cores}")
    study = _load(args)

    extra = [*_profile_args(args.profile), *args.snakemake_args]
    dry_run = any(a in DRY_RUN_FLAGS for a in args.snakemake_args)
    partial = any(a.split("=")[0] in PARTIAL_RUN_FLAGS for a in args.snakemake_args)
    if dry_run and args.until_precise:
        raise UserError("`--until-precise` needs real runs; leave out Snakemake's --dry-run")

    def run(s):
        # a dry run's whole point is Snakemake's list of jobs and reasons: show it
        return run_study(s, args.study, Path.cwd(), args.cores, extra, args.verbose or dry_run)

    if args.until_precise:
        code = run_until_precise(study, run, args.max_replicates, Path.cwd(),
                                 say=lambda text: print(text, file=sys.stderr))
    else:
        code = run(with_allocation(study))
    if code != 0:
        return EXIT_RUN_FAILED
    if dry_run:
        print("estbench: dry run: the jobs above are what a run would do; nothing was computed")
        return 0
    if partial:
        print(f"estbench: stopped where Snakemake was told to ({' '.join(args.snakemake_args)}); "
              f"the report was not brought up to date: run again without it to finish")
        return 0
    from estbench.app.summary import run_summary, summary_lines
    summary = run_summary(study.layout())
    print("\n".join(summary_lines(summary)))
    return summary.exit_status


def cmd_status(args) -> int:
    from collections import Counter

    from estbench.app.status import pending_jobs, shard_plans
    from estbench.study.allocation import with_allocation
    study = with_allocation(_load(args))
    plans = shard_plans(study)
    todo = [p for p in plans if p.pending]
    print(f"study {study.name!r}: {len(plans) - len(todo)} of {len(plans)} shards up to date; "
          f"the next run computes {len(todo)} shard(s) in {len(pending_jobs(study, plans=plans))} job(s)")
    for (name, reason), count in sorted(Counter((p.estimator, p.reason) for p in todo).items()):
        reps = sum(p.replicates for p in todo if p.estimator == name and p.reason == reason)
        print(f"  {name}: {count} shard(s), {reps:,} replicates: {reason}")
    store = study.layout().store
    if not store.exists():
        print("store: not created yet")
        return 0
    from estbench.analyse.store import read_table
    table = read_table(store, """
        SELECT estimator, count(DISTINCT scenario) AS scenarios, count(*) AS replicates,
               count(*) FILTER (WHERE status <> 'ok') AS failed
        FROM estimates GROUP BY estimator ORDER BY estimator""")
    print(f"store {store}:")
    for row in table.to_pylist():
        print(f"  {row['estimator']}: {row['replicates']} replicates in {row['scenarios']} scenario(s), "
              f"{row['failed']} failed")
    return 0


def cmd_report(args) -> int:
    from estbench.report.render import render
    layout = _load(args).layout()
    render(layout)
    print(f"estbench: wrote {layout.report_html}, {layout.performance_csv} and {layout.checks_csv} "
          f"from the store")
    return 0


def cmd_query(args) -> int:
    import pyarrow.csv as pacsv

    from estbench.app.query import run_query
    table = run_query(_load(args).layout().store, args.sql)
    pacsv.write_csv(table, sys.stdout.buffer)
    return 0


def print_table(header: list[str], rows: list[list]) -> None:
    """Plain aligned text columns on stdout."""
    cells = [header] + [["—" if v is None else str(v) for v in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    for r in cells:
        print("  ".join(v.rjust(w) if i else v.ljust(w) for i, (v, w) in enumerate(zip(r, widths))).rstrip())


def cmd_plan(args) -> int:
    from estbench.analyse.mcse import SD_MEASURES, SHARE_MEASURES, replicates_needed
    study = _load(args)
    if not study.targets:
        print(f"study {study.name!r} sets no MCSE targets: add `targets:` (measure -> largest acceptable MCSE)")
        return 0
    store = study.layout().store
    if store.exists():
        from estbench.analyse.measures import plan_replicates
        from estbench.analyse.store import measure_options, open_read_only
        con = open_read_only(store)
        try:
            table = plan_replicates(con, "estimates", "truth", study.targets, **measure_options(study))
            names = {k: (pos, label) for k, pos, label in con.execute(
                "SELECT scenario, position, dgm || ' n=' || n FROM scenarios").fetchall()}
        finally:
            con.close()
        rows = []
        for r in sorted(table.to_pylist(), key=lambda r: names.get(r["scenario"], (0, ""))[0]):
            met = r["mcse"] is not None and r["mcse"] <= r["target"]
            rows.append([names.get(r["scenario"], (0, r["scenario"]))[1], r["estimator"], r["measure"],
                         None if r["mcse"] is None else f"{r['mcse']:.3g}", f"{r['target']:g}",
                         r["n_ok"], r["n_needed"], r["n_to_run"], "met" if met else "NOT met"])
        print(f"Replicates needed for each target, from the {store} store "
              f"(n_sim = n_ok·(MCSE/target)²; 'to run' allows for failed replicates):")
        print_table(["scenario", "estimator", "measure", "MCSE now", "target", "replicates",
                     "needed", "to run", "status"], rows)
        return 0
    print(f"No results yet for {study.name!r}: worst-case plan before any run "
          f"(shares at P = 0.5{'; SD guess ' + str(args.sd) if args.sd else ''}).")
    rows = []
    for measure, target in study.targets.items():
        if measure in SHARE_MEASURES:
            rows.append([measure, target, replicates_needed(measure, target), "worst case P(1−P) = 1/4"])
            if measure == "coverage":
                rows.append([measure, target, replicates_needed(measure, target, proportion=study.level),
                             f"if coverage = the nominal {study.level:g}"])
        elif args.sd is not None and measure in SD_MEASURES:
            rows.append([measure, target, replicates_needed(measure, target, sd=args.sd),
                         f"SD of estimates = {args.sd}"])
        else:
            rows.append([measure, target, None, "needs a pilot run" +
                         (" or --sd GUESS" if measure in SD_MEASURES else "")])
    print_table(["measure", "target", "replicates", "basis"], rows)
    return 0


def cmd_init(args) -> int:
    from estbench.app.scaffold import new_project
    written = new_project(args.dir)
    for path in written:
        print(f"wrote {path}")
    where = "" if args.dir.resolve() == Path.cwd().resolve() else f"cd {args.dir} && "
    print(f"Next: {where}estbench check, then estbench run --cores 2 (README.md there says more)")
    return 0


def cmd_new(args) -> int:
    from estbench.app.scaffold import new_estimator
    written = new_estimator(args.name, args.dir)
    for path in written:
        print(f"wrote {path}")
    print(f"Next: edit {written[0].name}, run `python -m pytest {written[1]}`, then add to your study\n"
          f"  estimators:\n    {args.name}: {{function: \"{args.name}:{args.name}\", target: mean}}\n"
          f"and `estbench run`: only the new estimator's shards are computed.")
    return 0


def _verb(sub, name: str, func, help: str, description: str, study: bool = True) -> argparse.ArgumentParser:
    """Add one verb; most take the study file as their optional positional argument."""
    p = sub.add_parser(name, help=help, description=description)
    if study:
        _study_arg(p)
    p.set_defaults(func=func)
    return p


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="estbench",
        description="Run simulation studies of estimators: shards -> DuckDB store -> report.")
    parser.add_argument("--version", action="version", version=f"estbench {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = _verb(sub, "run", cmd_run, "run the whole study (simulate, ingest, report)",
              "Run the study through Snakemake; results go to ./results/<study>/. "
              "Finished shards are kept, so running again resumes.")
    p.add_argument("--cores", type=int, default=os.cpu_count() or 1,
                   help="cores to use (default: all, here %(default)s)")
    p.add_argument("--until-precise", action="store_true",
                   help="treat `replicates` as a pilot, then add seed blocks scenario by scenario until "
                        "every MCSE target in `targets` is met (or --max-replicates is reached)")
    p.add_argument("--max-replicates", type=int, default=1_000_000,
                   help="with --until-precise: most replicates per scenario (default %(default)s)")
    p.add_argument("--profile", metavar="NAME_OR_DIR",
                   help="Snakemake profile: a folder, or the name of a bundled profile (e.g. slurm)")
    p.add_argument("--verbose", action="store_true",
                   help="show Snakemake's own output instead of the progress line")
    p.set_defaults(snakemake_args=[])
    p.formatter_class = argparse.RawDescriptionHelpFormatter
    p.epilog = ("Arguments after a lone -- go to Snakemake unchanged, e.g. estbench run -- --dry-run.\n\n"
                "Exit status:\n"
                "  0    the run completed; a summary of the store is printed\n"
                f"  {EXIT_RUN_FAILED}    the run failed; the end of Snakemake's log is printed, finished shards are kept\n"
                f"  {EXIT_USER_ERROR}    a user error: a bad study file or option, or another run of the study\n"
                "       in progress\n"
                f"  {EXIT_FAILED_REPLICATES}    the run completed, but an estimator failed on every replicate of a\n"
                "       scenario or on more than the study's max_failed_share of them; the results\n"
                "       and the report are kept\n"
                f"  {EXIT_INTERRUPTED}  interrupted (Ctrl-C); run the same command again to resume")

    _verb(sub, "check", cmd_check, "validate a study file and say what it would run",
          "Validate the study file (schema and meaning) without running anything.")
    _verb(sub, "status", cmd_status, "what the next run computes and why, replicates in the store",
          "Compare every shard with the spec and estimator code it must have: say which shards the "
          "next run computes and why (missing, estimator code changed, settings changed, more "
          "blocks, damaged), and count the replicates already in the store.")
    p = _verb(sub, "plan", cmd_plan, "replicates needed to meet the MCSE targets",
              "For every scenario x estimator x targeted measure: the MCSE so far, the target and "
              "the replicates needed (n_sim = Var/target^2; for a share such as coverage "
              "C(1-C)/target^2). Before any run, the worst case.")
    p.add_argument("--sd", type=float, default=None,
                   help="before any run: a guess of the SD of the estimates, for bias/empirical_se/mse/rmse targets")
    _verb(sub, "report", cmd_report, "re-render report.html and the CSVs from the store",
          "Render the report and CSVs from the store alone; simulates nothing.")
    p = _verb(sub, "new", cmd_new, "scaffold a new estimator module and its test",
              "Write NAME.py (a commented estimator to fill in) and test_NAME.py in --dir (default: "
              "the current folder, where a study file beside them finds the module).", study=False)
    p.add_argument("kind", choices=["estimator"], help="what to create")
    p.add_argument("name", help="the estimator's module and function name")
    p.add_argument("--dir", type=Path, default=None,
                   help="folder to write into (default: ./estimators if it exists, else .)")
    p = _verb(sub, "query", cmd_query, "read-only SQL against the store, CSV to stdout",
              "Run one read-only SQL query against the study's store. Tables: study, scenarios, "
              "truths, estimators, shards, provenance, estimates, performance, checks.")
    p.add_argument("sql", help="the SQL query")
    p = _verb(sub, "init", cmd_init, "create a study project in a folder",
              "Create a study project: a commented study file (study.yaml), an estimators/ folder "
              "with an example plug-in estimator and its test, a .gitignore for results, and a "
              "README of the next commands. Refuses to overwrite existing files.", study=False)
    p.add_argument("dir", nargs="?", type=Path, default=Path("."),
                   help="folder of the new project (created if missing; default: .)")
    return parser


@entry_point
def main(argv=None) -> int:
    """The ``estbench`` command (also ``python -m estbench``)."""
    argv = list(sys.argv[1:] if argv is None else argv)
    passthrough = []
    if "--" in argv:
        cut = argv.index("--")
        argv, passthrough = argv[:cut], argv[cut + 1:]
    args = build_parser().parse_args(argv)
    if passthrough:
        if args.command != "run":
            raise UserError("only `run` passes arguments after -- to Snakemake")
        args.snakemake_args = passthrough
    return args.func(args)


if __name__ == "__main__":
    sys.exit(main())
