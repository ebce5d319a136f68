"""The ``report-kit`` command line: parse, call the library once, print.

Exit codes: 0 success; 1 invalid inputs (the message says what and where);
2 usage error; 3 verification found a difference. Errors never show a
traceback unless REPORT_KIT_DEBUG=1 is set.
"""

from __future__ import annotations

import json
import os
import signal
import sys
import time
from pathlib import Path

import click

from report_kit import __version__
from report_kit.errors import ReportKitError, UsageError


def _progress(message: str) -> None:
    click.echo(f"  · {message}", err=True)


def _plan_line(project: Path) -> str:
    """One line on the plan lock: absent, kept, or how many keys changed since."""
    from report_kit.audit.planlock import plan_deviations

    dev = plan_deviations(project)
    if not dev["locked"]:
        return "plan: not locked (report-kit lock PATH freezes design.yaml before outcomes are analysed)"
    changes = dev["changes"]
    if not changes:
        return f"plan: locked on {dev['locked_at']}; design.yaml unchanged since"
    keys = ", ".join(c["key"] for c in changes[:5]) + (" …" if len(changes) > 5 else "")
    return f"plan: locked on {dev['locked_at']}; {len(changes)} key(s) changed since: {keys}"


def _fail(err: Exception, code: int) -> None:
    click.echo(f"report-kit: error: {err}", err=True)
    sys.exit(code)


class _ChunkBar:
    """A rich progress bar of the chunks of randomization draws done (on stderr).

    Off a terminal (a log file, a CI job) a long pass prints a plain line at
    every tenth of the chunks instead, once it has run for
    :data:`PLAIN_AFTER_SECONDS` (short passes stay quiet).
    """

    PLAIN_AFTER_SECONDS = 10.0

    def __init__(self) -> None:
        self._progress = None
        self._task = None
        self._done = 0
        self._off = False
        self._started = None
        self._tenth = 0

    def __enter__(self) -> _ChunkBar:
        return self

    def __exit__(self, *exc) -> None:
        if self._progress is not None:
            self._progress.stop()

    def update(self, done: int, total: int) -> None:
        from rich.console import Console
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

        if self._off:
            self._plain(done, total)
            return
        if self._progress is None:
            console = Console(stderr=True)
            if not console.is_terminal:
                self._off = True
                self._plain(done, total)
                return
            self._progress = Progress(TextColumn("  · randomization draws"), BarColumn(), MofNCompleteColumn(),
                                      TimeElapsedColumn(), console=console, transient=True)
            self._progress.start()
        if self._task is None or done < self._done:
            self._task = self._progress.add_task("chunks", total=total)
        self._done = done
        self._progress.update(self._task, completed=done, total=total)

    def _plain(self, done: int, total: int) -> None:
        """A line per tenth of the chunks of a long pass: ``  · randomization draws: 30% (120 of 400 chunks, 95 s)``."""
        now = time.monotonic()
        if self._started is None or done < self._done:   # a new pass
            self._started, self._tenth = now, 0
        self._done = done
        tenth = (10 * done) // max(total, 1)
        if tenth > self._tenth and now - self._started >= self.PLAIN_AFTER_SECONDS:
            self._tenth = tenth
            click.echo(f"  · randomization draws: {10 * tenth}% ({done} of {total} chunks, "
                       f"{now - self._started:.0f} s)", err=True)


class Group(click.Group):
    """Maps every report-kit error to its exit code, without a traceback."""

    def invoke(self, ctx):
        try:
            return super().invoke(ctx)
        except ReportKitError as err:
            _fail(err, err.exit_code)
        except (click.exceptions.Exit, click.exceptions.Abort, click.ClickException, SystemExit):
            raise
        except KeyboardInterrupt as err:  # Ctrl-C, or SIGTERM/SIGHUP during a run (runfolder.Stopped)
            signum = getattr(err, "signum", 2)
            _fail(Exception(f"stopped ({signal.Signals(signum).name}); no run folder was left behind and "
                            "earlier runs are untouched"), 128 + signum)
        except BrokenPipeError:
            # The reader went away (e.g. `report-kit diff A B | head`): stop quietly.
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
            sys.exit(0)
        except Exception as err:  # noqa: BLE001 - the last line of defence against tracebacks
            if os.environ.get("REPORT_KIT_DEBUG") == "1":
                raise
            _fail(Exception(f"internal error ({type(err).__name__}: {err}); "
                            "set REPORT_KIT_DEBUG=1 to see the traceback"), 1)


@click.group(cls=Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="report-kit")
def main() -> None:
    """report-kit: randomized-experiment analysis from a project folder to an audited report."""


@main.command(short_help="Scaffold a project folder with a commented design.yaml.")
@click.argument("path", type=click.Path(path_type=Path))
@click.option("--title", help="Title written into design.yaml.")
def new(path: Path, title: str | None) -> None:
    """Scaffold a project folder with a commented design.yaml."""
    from report_kit.inputs.scaffold import new_project

    created = new_project(path, title=title)
    click.echo(f"created {created}/design.yaml and {created}/data/units.csv (an invented sample to replace)")
    click.echo(f"next: edit design.yaml, then `report-kit check {created}`")


@main.command(short_help="Validate spec and data, verify the assignment; write nothing.")
@click.argument("path", type=click.Path(path_type=Path))
def check(path: Path) -> None:
    """Validate the spec and the data and verify the assignment; write nothing."""
    from report_kit.design.assignment import check_assignment
    from report_kit.pipeline import load_project

    study = load_project(path)
    d = study.spec.design
    z = study.z
    result = check_assignment(study)
    if result.status == "mismatch":
        click.echo(result.describe(), err=True)
        raise ReportKitError(f"{study.spec.path}: design.seed does not reproduce column "
                             f"'{d.treatment}' ({len(result.differing_ids)} unit(s) differ)")
    click.echo(f"ok: {study.spec.path}")
    if d.arms is None:
        sizes = f"{int(z.sum())} treated, {len(z) - int(z.sum())} control"
    else:
        sizes = ", ".join(f"{int((z == k).sum())} {arm}" for k, arm in enumerate(d.arms))
    click.echo(f"  {len(z)} units ({sizes}), mechanism {d.mechanism}, {len(study.spec.outcomes)} outcome(s)")
    for f in study.inputs:
        click.echo(f"  input {f.path}: {f.rows} rows, sha256 {f.sha256[:16]}…")
    click.echo(f"  {result.describe()}")
    click.echo(f"  {_plan_line(study.spec.project_dir)}")


@main.command(short_help="Draw the assignment from design.seed into data/.")
@click.argument("path", type=click.Path(path_type=Path))
@click.option("-o", "--output", type=click.Path(path_type=Path), help="Where to write (default data/assignment.csv).")
@click.option("--force", is_flag=True, help="Overwrite an existing assignment file.")
def assign(path: Path, output: Path | None, force: bool) -> None:
    """Draw the assignment from design.seed and write it beside the data."""
    from report_kit.design.assignment import write_assignment
    from report_kit.design.mechanism import number_treated
    from report_kit.inputs.data import load_units_for_assignment
    from report_kit.pipeline import project_dir_of
    from report_kit.inputs.spec import load_spec

    spec = load_spec(project_dir_of(path))
    frame = load_units_for_assignment(spec, treated_count=number_treated)
    target = write_assignment(spec, frame, out=output, force=force)
    click.echo(f"wrote {target} ({len(frame)} units, drawn from design.seed {spec.design.seed})")
    if spec.design.treatment in frame.columns:
        click.echo(f"note: {spec.data.units} already has a '{spec.design.treatment}' column; compare it with the "
                   f"drawn file (`report-kit check` does this) rather than merging the file in", err=True)
    else:
        click.echo(f"next: add the '{spec.design.treatment}' column to {spec.data.units} "
                   f"(or list {target.name} under data.merge)", err=True)


@main.command(short_help="Analyse, execute the report notebooks, render to runs/<run-id>/.")
@click.argument("path", type=click.Path(path_type=Path))
@click.option("--renderer", type=click.Choice(["builtin", "quarto"]), default=None,
              help="builtin (nbconvert + weasyprint, default) or quarto (when on PATH).")
@click.option("--compare-to", type=click.Path(path_type=Path), help="A previous run: adds 'Changes since the previous run'.")
@click.option("--no-pdf", is_flag=True, help="Skip the PDF (HTML only).")
@click.option("--workers", type=click.IntRange(min=1),
              help="Compute the randomization draws on a local Dask cluster of N worker processes.")
@click.option("--scheduler", metavar="ADDRESS",
              help="Compute the randomization draws on an existing Dask cluster (e.g. tcp://HOST:8786); "
                   "default: $REPORT_KIT_SCHEDULER.")
def run(path: Path, renderer: str | None, compare_to: Path | None, no_pdf: bool,
        workers: int | None, scheduler: str | None) -> None:
    """Analyse, execute the report notebooks and render to runs/<run-id>/."""
    from report_kit.report.notebooks import ReportKernel

    with ReportKernel() as kernel, _ChunkBar() as bar:  # the kernel starts now: overlaps imports and analysis
        from report_kit.pipeline import RunOptions, run_project

        options = RunOptions(renderer=renderer or "builtin", compare_to=compare_to,
                             argv=tuple(["report-kit", *sys.argv[1:]]), pdf=not no_pdf,
                             workers=workers, scheduler=scheduler)

        def announce(run_dir: str) -> None:
            click.echo(f"report: {run_dir}/report.html")
            _progress(_plan_line(Path(run_dir).parent.parent))

        outcome = run_project(path, options, progress=_progress, on_run_id=announce, kernel=kernel,
                              on_chunk=bar.update)
    click.echo(f"done: {outcome.report_html}")
    if outcome.report_pdf:
        click.echo(f"      {outcome.report_pdf}")


@main.command(short_help="What changed between two runs: inputs and results.")
@click.argument("run_a", type=click.Path(path_type=Path))
@click.argument("run_b", type=click.Path(path_type=Path))
@click.option("--json", "as_json", is_flag=True, help="Print the differences as JSON.")
@click.option("--max-items", default=20, show_default=True, type=click.IntRange(min=1), help="Changed cells and results listed before summarising.")
def diff(run_a: Path, run_b: Path, as_json: bool, max_items: int) -> None:
    """What changed between two runs: inputs (row level, by id) and results."""
    from report_kit.audit.compare import compare_runs, format_diff_text

    result = compare_runs(run_a, run_b)
    if as_json:
        click.echo(json.dumps(result.to_dict(), indent=2, sort_keys=False))
    else:
        text = format_diff_text(result, max_items=max_items)
        for line in text.splitlines():
            emphasised = line.lstrip().startswith("!!")
            click.echo(click.style(line, bold=True) if emphasised else line)


@main.command(short_help="Re-run a run (or archive) from its recorded inputs; exit 3 on a difference.")
@click.argument("target", type=click.Path(path_type=Path))
@click.option("--report", "with_report", is_flag=True,
              help="Also render the report again from results.json and compare report.html and the tables.")
def verify(target: Path, with_report: bool) -> None:
    """Re-run a run folder (or an archive .zip) from its recorded inputs; exit 3 on any difference."""
    from report_kit.errors import VerificationError
    from report_kit.pipeline import analyse_project
    from report_kit.audit.report_check import format_report_check
    from report_kit.audit.verify import format_verify_text, verify_run

    click.echo(f"verifying {target} (re-running the analysis from the recorded inputs)…", err=True)
    report = verify_run(target, analyse=analyse_project)
    text = format_verify_text(report)
    if with_report:
        body, verdict = text.rstrip("\n").rsplit("\n", 1)
        check = _check_report_of(target)
        text = f"{body}\n{format_report_check(check)}\n\n{verdict}"
        if not check.ok and report.ok:
            text = text[: -len(verdict)] + "NOT VERIFIED: the report differs from a fresh rendering of results.json"
        same_report = check.ok
    else:
        same_report = True
    click.echo(text)
    if not report.ok or not same_report:
        raise VerificationError("verification found differences (listed above)")


def _check_report_of(target: Path):
    """``verify --report``: render the run's report again (from an archive: its extracted run folder)."""
    import tempfile

    from report_kit.audit.archive import safe_extract
    from report_kit.audit.report_check import check_report

    click.echo("rendering the report again from results.json…", err=True)
    if target.is_file():
        with tempfile.TemporaryDirectory(prefix="report-kit-verify-") as tmp:
            return check_report(safe_extract(target, Path(tmp) / "archive"))
    return check_report(target)


@main.command(short_help="Zip a run with its inputs, manifest, RO-Crate and checksums.")
@click.argument("run_dir", type=click.Path(path_type=Path))
@click.option("-o", "--output", type=click.Path(path_type=Path), help="Zip file to write (default: beside the run).")
@click.option("--with-compared/--without-compared", "with_compared", default=None,
              help="Include the run this run was compared with (default: when it was compared).")
def archive(run_dir: Path, output: Path | None, with_compared: bool | None) -> None:
    """One .zip with design.yaml, the inputs, the run folder, manifest, RO-Crate and checksums."""
    from report_kit.audit.archive import archive_run

    click.echo(f"archived: {archive_run(run_dir, output, with_compared=with_compared)}")


@main.command(short_help="Freeze design.yaml as the plan (design.lock).")
@click.argument("path", type=click.Path(path_type=Path))
@click.option("--force", is_flag=True, help="Replace an existing lock (the report will show the new one).")
def lock(path: Path, force: bool) -> None:
    """Record design.yaml as the locked plan (design.lock) before outcomes are analysed."""
    from report_kit.pipeline import project_dir_of
    from report_kit.audit.planlock import lock_plan

    click.echo(f"locked: {lock_plan(project_dir_of(path), force=force)}")


@main.command(short_help="Power and minimum detectable effect for the design as planned.")
@click.argument("path", type=click.Path(path_type=Path))
@click.option("--sd", type=float, help="Standard deviation of the outcome, in its own units (required).")
@click.option("--effect", type=float, help="Effect to compute the power for (outcome units).")
@click.option("--power", "target_power", type=float, default=0.8, show_default=True,
              help="Target power of the minimum detectable effect.")
@click.option("--icc", type=float, help="Intraclass correlation within clusters (required for cluster designs).")
@click.option("--cluster-size", type=float, help="Planned units per cluster (cluster designs without data).")
@click.option("--n-treated", type=int, help="Planned treated units (designs without data).")
@click.option("--n-control", type=int, help="Planned control units (designs without data).")
@click.option("--n-clusters", type=int, help="Planned clusters in all (cluster designs without data).")
@click.option("--outcome", help="Outcome whose pre-specified test is planned for (default: first primary).")
@click.option("--simulate", type=int, default=0, show_default=True,
              help="Simulated experiments under the real mechanism and randomization test (0: analytic only).")
@click.option("--draws", type=int, default=499, show_default=True,
              help="Randomization draws of the test in each simulated experiment "
                   "(every assignment instead when there are at most max(--draws, 10000) "
                   "and at most analysis.max_exact).")
@click.option("--seed", type=int, help="Seed of the simulation (default: analysis.seed).")
@click.option("--attrition", type=float, default=0.0, show_default=True,
              help="Expected share of units whose outcome will be missing.")
@click.option("--takeup-treated", type=float, help="Expected share taking the treatment when offered.")
@click.option("--takeup-control", type=float, help="Expected share taking the treatment when not offered.")
@click.option("--json", "as_json", is_flag=True, help="Print the plan as JSON.")
def power(path: Path, sd: float | None, effect: float | None, target_power: float, icc: float | None,
          cluster_size: float | None, n_treated: int | None, n_control: int | None, n_clusters: int | None,
          outcome: str | None, simulate: int, draws: int, seed: int | None, attrition: float,
          takeup_treated: float | None, takeup_control: float | None, as_json: bool) -> None:
    """Power and minimum detectable effect for the design as planned."""
    from report_kit.pipeline import project_dir_of
    from report_kit.planning.power import format_plan_text, plan_power

    if sd is None:
        raise UsageError("--sd is required: the standard deviation of the outcome in its own units "
                         "(e.g. from a pilot or an earlier study), as in `report-kit power PATH --sd 12.5`")
    project = project_dir_of(path)
    step = max(1, simulate // 10)

    def report(done: int, total: int) -> None:
        if done == 1:
            click.echo(f"simulating {total} experiments with the design's own mechanism and test…", err=True)
        if done % step == 0 or done == total:
            _progress(f"simulated {done}/{total} experiments")

    try:
        plan = plan_power(project, sd=sd, effect=effect, power=target_power, icc=icc, cluster_size=cluster_size,
                          n_treated=n_treated, n_control=n_control, n_clusters=n_clusters, outcome=outcome,
                          simulate=simulate, draws=draws, seed=seed, progress=report, attrition=attrition,
                          takeup_treated=takeup_treated, takeup_control=takeup_control)
    except (TypeError, ValueError, UsageError) as err:  # the options were wrong; name them as typed: `n_treated` -> --n-treated
        import re

        names = {"sd", "effect", "power", "icc", "cluster_size", "n_treated", "n_control", "n_clusters",
                 "outcome", "simulate", "draws", "seed", "attrition", "takeup_treated", "takeup_control"}
        text = re.sub(r"`(\w+)`", lambda m: "--" + m[1].replace("_", "-") if m[1] in names else m[0], str(err))
        raise UsageError(text) from err
    click.echo(json.dumps(plan.to_dict(), indent=2) if as_json else format_plan_text(plan))


@main.command(short_help="Print the JSON Schema of design.yaml.")
def schema() -> None:
    """Print the JSON Schema of design.yaml."""
    from report_kit.inputs.spec import design_schema

    click.echo(json.dumps(design_schema(), indent=2))


if __name__ == "__main__":  # pragma: no cover
    main()
