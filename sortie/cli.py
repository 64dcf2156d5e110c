"""The command line: a thin edge over the library.

Each command parses its arguments, calls the library, and formats the answer. Every
:class:`~sortie.errors.SortieError` and every usage error (unknown command or option, missing
argument) becomes one line on stderr and exit code 2; ``--debug`` shows the traceback instead.
Prefect is imported only inside ``run`` and ``resume``, so ``check``, ``status`` and ``export``
start fast. A run records itself in the ledger (:mod:`sortie.runstate`) so ``status`` can tell
running, interrupted, finished and failed apart.
"""

from __future__ import annotations

import importlib.metadata
import json
import os
import sys
from pathlib import Path
from typing import Annotated, NoReturn

import typer

from sortie.errors import ConfigError, SortieError

# Plain (click-style) help: it shows every default as "[default: ...]" and no type after a flag;
# rich markup would swallow a bracketed default as a style tag and print "<bool>" after each flag.
app = typer.Typer(add_completion=False, pretty_exceptions_enable=False, rich_markup_mode=None)

CAUTION = ("Caution: surrogate predictions must be confirmed by the real solver and by test; structural and "
           "safety sign-off follows your organisation's own rules and licensed practice.")


def _print_version(value: bool) -> None:
    if value:
        try:
            version = importlib.metadata.version("sortie")
        except importlib.metadata.PackageNotFoundError:
            version = "unknown (not installed; run 'pip install .')"
        typer.echo(f"sortie {version}")
        raise typer.Exit()


@app.callback(invoke_without_command=True)
def _root(
    ctx: typer.Context,
    version: Annotated[bool, typer.Option("--version", callback=_print_version, is_eager=True,
                                          help="Print the version and exit.")] = False,
) -> None:
    """Run CFD design campaigns: designed experiments, solver runs, surrogates and infill."""
    if ctx.invoked_subcommand is None:
        # `sortie` alone: the help on stdout (so it can be paged), and exit 2 because a command was expected
        typer.echo(ctx.get_help())
        typer.echo("error: no command given; choose one of the commands above (sortie COMMAND --help for each)", err=True)
        raise typer.Exit(2)


# The arguments several commands share, spelled once.
# readable=False: the config loader, not typer, says in one line why a file cannot be read
ConfigArg = Annotated[Path, typer.Argument(metavar="CONFIG", readable=False, help="Campaign config (YAML).")]
DirArg = Annotated[Path, typer.Argument(metavar="DIR", help="Campaign folder.")]
CancelJobs = Annotated[bool, typer.Option("--cancel-jobs", help="On Ctrl-C or SIGTERM, cancel batch jobs too "
                                          "(default: leave them running for resume).")]


def _load_config(path: Path):
    from sortie.adapters.registry import load_checked_config

    return load_checked_config(path)


@app.command()
def check(config: ConfigArg) -> None:
    """Validate a config without running anything.

    Example: sortie check configs/sled-aftbody.yaml
    """
    cfg = _load_config(config)
    from sortie.plan import sampling_notes
    from sortie.sizes import initial_size

    n_initial = initial_size(cfg.plan.initial, cfg.space())  # counted, not drawn
    n_fixed = cfg.designs_before_infill()
    n_screen = n_fixed - 1 - n_initial
    n_cond = len(cfg.condition_list())
    for note in sampling_notes(cfg.plan, cfg.space().n_dims):
        typer.echo(f"note: {note}")
    screen = f"{n_screen} screening + " if n_screen else ""
    typer.echo(f"{config}: ok - {cfg.space().n_dims} free parameters, {n_cond} conditions, "
               f"baseline + {screen}{n_initial} initial designs = {n_fixed * n_cond} cases, plan {cfg.target_designs()} designs, "
               f"{cfg.slots} slots, adapter {cfg.solver['adapter']}")
    typer.echo("surrogates: {} ({})".format(*cfg.surrogate_mode()))


@app.command()
def run(
    config: ConfigArg,
    directory: Annotated[Path | None, typer.Option("--dir", metavar="DIR", show_default="campaigns/<name>",
                                                   help="Campaign folder.")] = None,
    cancel_jobs: CancelJobs = False,
) -> None:
    """Run a campaign to the end of its plan; an existing folder of the same campaign is continued.

    Example: sortie run configs/sled-aftbody.yaml --dir campaigns/sled
    """
    from sortie import campaign
    from sortie.ledger import writable_dir
    from sortie.lock import CampaignLock

    cfg = _load_config(config)
    directory = directory or Path("campaigns") / cfg.campaign.name
    writable_dir(directory)
    with CampaignLock(directory) as lock:
        prepared = campaign.prepare(config, cfg, directory)
        typer.echo(f"{'continuing' if prepared.existed else 'starting'} campaign {cfg.campaign.name!r} in {directory}")
        for change in prepared.accepted:
            typer.echo(f"accepted config change: {change}")
        _conduct(directory, cfg, lock, cancel_jobs)


@app.command()
def resume(
    directory: DirArg,
    cancel_jobs: CancelJobs = False,
) -> None:
    """Carry on an interrupted campaign with its recorded config: nothing finished is lost or run twice.

    Example: sortie resume campaigns/sled-aftbody
    """
    from sortie import campaign
    from sortie.lock import CampaignLock

    with CampaignLock(directory) as lock:
        campaign.upgrade(directory)  # a ledger of an older sortie gains its indexes here
        cfg, _ = campaign.load(directory)
        typer.echo(f"resuming campaign {cfg.campaign.name!r} in {directory}")
        _conduct(directory, cfg, lock, cancel_jobs)


def _conduct(directory: Path, cfg, lock, cancel_jobs: bool) -> None:
    """Run the campaign flow under the held lock, recording the run (state, heartbeat, ending);
    an interrupt ends with the resume command."""
    import signal

    from sortie.progress import LedgerWatcher
    from sortie.runstate import RunRecord, Terminated

    if lock.stale_message():
        typer.echo(lock.stale_message())

    def _terminate(signum: int, frame: object) -> None:
        raise Terminated  # SIGTERM stops the run the same careful way as Ctrl-C

    signal.signal(signal.SIGTERM, _terminate)
    with RunRecord(directory) as record:
        try:
            _start_prefect(directory)
            from sortie.flows.campaign import run_campaign

            with LedgerWatcher(directory, cfg, stream=sys.stdout):
                run_campaign(directory, cancel_jobs=cancel_jobs)
        except KeyboardInterrupt as exc:  # Ctrl-C, or SIGTERM as Terminated
            by_term = isinstance(exc, Terminated)
            record.end("interrupted", "stopped by SIGTERM" if by_term else "stopped by Ctrl-C (SIGINT)")
            _print_interrupted(directory, by_term)
            raise typer.Exit(143 if by_term else 130) from None
    _print_result(directory, cfg)


def _start_prefect(directory: Path) -> None:
    """Prefect's settings (its home inside the campaign folder) and, unless PREFECT_API_URL names a
    running server, the run's own API server."""
    from sortie.flows.runtime import configure_prefect
    from sortie.flows.server import start_local_api

    owned_home = configure_prefect(directory)
    if not os.environ.get("PREFECT_API_URL"):
        typer.echo("starting a local Prefect API for this run (about 10 s; set PREFECT_API_URL to use a running server)")
        start_local_api(directory, fresh_database=owned_home)


def _print_interrupted(directory: Path, by_term: bool) -> None:
    from sortie.ledger import Ledger, ledger_path

    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        left = ledger.cases(states=("submitting", "running"))
    jobs = f"; {len(left)} batch jobs left running, to be re-attached" if left else ""
    typer.echo(f"{'stopped by SIGTERM' if by_term else 'interrupted'}; finished cases are kept{jobs}. "
               f"Continue with: sortie resume {directory}", err=True)


def _print_result(directory: Path, cfg) -> None:
    from sortie.ledger import Ledger, ledger_path
    from sortie.status import summary

    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        s = summary(ledger, cfg)
    typer.echo("")
    typer.echo(f"campaign {cfg.campaign.name!r}: {s['designs_done']} designs scored, {s['designs_failed']} failed; "
               f"{s['cases_done']} cases done, {s['cases_failed']} failed")
    base, best = s["baseline"], s["best"]
    if base and base["objective"] is not None:
        typer.echo(f"baseline (design {base['design']}): objective {base['objective']:.6g}")
    if best:
        change = ""
        if base and base["objective"]:
            change = f", {100 * (best['objective'] - base['objective']) / abs(base['objective']):+.1f} % against the baseline"
        typer.echo(f"best design {best['design']} ({best['stage']}): objective {best['objective']:.6g}{change} "
                   f"({'feasible' if best['feasible'] else 'no feasible design yet; this one violates least'})")
        typer.echo("  " + ", ".join(f"{k}={_fmt(v)}" for k, v in best["values"].items()))
        pred = best.get("prediction")
        if pred:
            typer.echo(f"  predicted when proposed: objective {pred['objective_mean']:.6g} +/- {pred['objective_std']:.3g}; "
                       f"the solver gave {best['objective']:.6g}")
    for target, choice in s["models"].items():
        scored = ", ".join(f"{c['name']} {c['loo_rmse']:.3g}" for c in choice["scores"] if c["loo_rmse"] is not None)
        typer.echo(f"surrogate for {target}: {choice['chosen']}, {choice['rule']} (leave-one-out RMSE: {scored})")
    for line in _stage_lines(s):
        typer.echo(line)
    typer.echo(f"results: ledger {ledger_path(directory)}, case folders {directory / 'cases'}")
    typer.echo(f"next: sortie report {directory}   |   sortie status {directory}   |   sortie export {directory} --to designs.csv")
    typer.echo(CAUTION)


def _stage_lines(s: dict) -> list[str]:
    """What the screening and confirmation stages concluded, one line each."""
    lines = []
    if s["screening"]:
        scr = s["screening"]
        r2 = scr.get("loo_r2")
        trust = ("; leave-one-out R² of its processes: " + ", ".join(f"{o} {_fmt(v)}" for o, v in zip(scr["outputs"], r2, strict=True))
                 if r2 is not None else "")
        lines.append(f"screening ({scr['method']}, {scr['rule']}): kept {', '.join(scr['selected'])}; "
                     f"fixed at baseline: {', '.join(scr['fixed']) or 'none'}{trust}")
    for check in s["confirmations"]:
        obj = check["objective"]
        lines.append(f"confirmation of design {check['design']}: {check['verdict']}; objective predicted "
                     f"{_fmt(obj['predicted'])} +/- {_fmt(obj['predicted_std'])}, actual {_fmt(obj['actual'])}")
    return lines


def _fmt(v: object) -> str:
    return f"{v:.4g}" if isinstance(v, float) else "-" if v is None else str(v)


@app.command()
def status(
    directory: DirArg,
    as_json: Annotated[bool, typer.Option("--json", help="Print one JSON object (with --watch: one per line as it changes).")] = False,
    watch: Annotated[bool, typer.Option("--watch", help="Follow a running campaign live until it ends (Ctrl-C to stop watching).")] = False,
) -> None:
    """Show what a campaign has done, from its ledger (safe while it runs).

    Example: sortie status campaigns/sled-aftbody --json
    """
    from sortie import campaign
    from sortie.ledger import Ledger, ledger_path
    from sortie.progress import LedgerWatcher, describe
    from sortie.runstate import describe_state
    from sortie.status import ledger_output_checks, summary

    cfg, _ = campaign.load(directory)
    if watch:
        try:
            if as_json:  # one JSON object per line as it changes, nothing else: the last line is the final state
                LedgerWatcher(directory, cfg, stream=sys.stdout).follow_json()
                return
            with LedgerWatcher(directory, cfg, stream=sys.stdout) as watcher:
                watcher.wait_until_finished()
        except KeyboardInterrupt:
            if as_json:
                return
            # stops the watching only; the campaign runs on elsewhere
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        s = summary(ledger, cfg)
        s["outputs_checked"] = ledger_output_checks(ledger, cfg)
    if as_json:
        typer.echo(json.dumps(s, indent=2))
        return
    typer.echo(f"campaign {s['campaign']!r} in {directory}: {describe_state(s['state'])}")
    typer.echo(describe(s))
    if s["failures_by_class"]:
        typer.echo("failed cases by class: " + ", ".join(f"{k} {v}" for k, v in sorted(s["failures_by_class"].items())))
    typer.echo(f"attempts: {s['attempts_total']} ({s['retries']} retries after a failure, {s['restarts']} restarts after an "
               "interrupted run)")
    for cls, entry in sorted(s["attempt_failures"].items()):
        typer.echo(f"  failed attempts, {cls}: {entry['attempts']}; e.g. {entry['reasons'][0]}")
    if s["running"]:
        typer.echo("in flight: " + ", ".join(f"{r['case']} (job {r['job_id'] or 'being submitted'})" for r in s["running"][:20])
                   + (f" and {len(s['running']) - 20} more" if len(s["running"]) > 20 else ""))
    typer.echo("designs by stage: " + ", ".join(f"{k} {v}" for k, v in s["stages"].items()))
    for line in _stage_lines(s):
        typer.echo(line)
    for target, choice in s["models"].items():
        scored = ", ".join(f"{c['name']} {c['loo_rmse']:.3g}" if c["loo_rmse"] is not None else f"{c['name']} skipped"
                           for c in choice["scores"])
        typer.echo(f"surrogate for {target}: {choice['chosen']} on {choice['n_points']} designs, {choice['rule']} "
                   f"(leave-one-out RMSE: {scored})")
    for r in s["outputs_checked"]:
        typer.echo(f"{r['output']}: predicted against actual on {r['designs']} proposed designs, RMS error {r['rms_error']:.3g}, "
                   f"{r['within_2_std']:.0%} within ±2σ; estimated noise σ {_fmt(r['noise_std'])}, "
                   f"spread of repeated designs {_fmt(r['repeat_spread']) if r['repeat_spread'] is not None else 'no repeats'}")


@app.command()
def export(
    directory: DirArg,
    to: Annotated[Path, typer.Option("--to", metavar="FILE", help="Output file: .csv or .parquet.")],
    what: Annotated[str, typer.Option("--what", metavar="TABLE", help="designs (one row per design) or cases (one row per design and condition).")] = "designs",
) -> None:
    """Write one row per design (parameters, objective, constraints, feasible, status) or per case.

    Example: sortie export campaigns/sled-aftbody --to designs.parquet
    """
    from sortie import campaign
    from sortie.api import case_table
    from sortie.ledger import Ledger, ledger_path
    from sortie.status import design_table

    suffix = to.suffix.lower()
    if suffix not in (".csv", ".parquet"):
        raise ConfigError([f"--to: {to} must end in .csv or .parquet"])
    tables = {"designs": design_table, "cases": case_table}
    if what not in tables:
        raise ConfigError([f"--what: {what!r} is not a table; allowed: designs, cases"])
    cfg, _ = campaign.load(directory)
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        table = tables[what](ledger, cfg)
    try:
        to.parent.mkdir(parents=True, exist_ok=True)
        if suffix == ".csv":
            table.to_csv(to, index=False)
        else:
            table.to_parquet(to, index=False)
    except OSError as err:
        raise ConfigError([f"--to: {to} cannot be written ({err.strerror or err})"]) from None
    typer.echo(f"wrote {len(table)} {what} to {to}")


@app.command()
def report(
    directory: DirArg,
    out: Annotated[Path | None, typer.Option("--out", metavar="FOLDER", show_default="DIR/report",
                                             help="Report folder; give one when DIR cannot be written.")] = None,
) -> None:
    """Write an HTML report with its figures (PNG) from the ledger; works while the campaign runs.

    Example: sortie report campaigns/sled-aftbody --out review/sled
    """
    from sortie.report import write_report

    index = write_report(directory, out)
    typer.echo(f"wrote {index}")
    typer.echo(CAUTION)


def main() -> None:
    """Entry point: run the app; a SortieError or a usage error becomes one line and exit code 2."""
    debug = "--debug" in sys.argv
    if debug:
        sys.argv.remove("--debug")
    try:
        code = app(standalone_mode=False, prog_name="sortie")  # returns the exit code of typer.Exit in this mode
        if isinstance(code, int) and code:
            sys.exit(code)
    except SortieError as err:
        if debug:
            raise
        for line in str(err).splitlines():
            typer.echo(f"error: {line}", err=True)
        sys.exit(2)
    except (typer.Abort, KeyboardInterrupt):
        typer.echo("aborted", err=True)
        sys.exit(130)
    except typer.Exit as exc:
        sys.exit(exc.exit_code)
    except typer.TyperException as exc:
        if debug:
            raise
        _usage_error(exc)


def _usage_error(exc: typer.TyperException) -> NoReturn:
    """Print a usage error as one line with a hint, and exit 2.

    ``typer.TyperException`` is the public base of every usage error typer raises (typer >= 0.25
    bundles its own click, so ``click.ClickException`` no longer matches them). The failing
    command's context, when the error carries one, names the command for the hint; otherwise the
    first command word on the command line does.
    """
    ctx = getattr(exc, "ctx", None)
    command = getattr(ctx, "command_path", None)
    if not command:
        names = {c.name or c.callback.__name__ for c in app.registered_commands if c.callback is not None}
        command = " ".join(["sortie", *[a for a in sys.argv[1:] if a in names][:1]])
    message = " ".join(exc.format_message().split())  # one line, whatever click wrapped
    message = message[:1].lower() + message[1:].rstrip(".")
    hint = "for the commands" if command == "sortie" else "for its arguments and options"
    typer.echo(f"error: {message}; run '{command} --help' {hint}", err=True)
    sys.exit(2)


if __name__ == "__main__":
    main()
