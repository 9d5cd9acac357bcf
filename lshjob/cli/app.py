"""Command line: a thin typer layer over :mod:`lshjob.jobs.sign`. Options are parsed here, work is done there."""

from __future__ import annotations

import shutil
import sys
from pathlib import Path
from typing import Annotated

import typer

from lshjob._version import __version__
from lshjob.audit.check import audit_index
from lshjob.cli._blas_probe import skip_blas_probe as _skip_blas_probe
from lshjob.cli.common import AsJson, Quiet
from lshjob.cli.common import emit as _emit
from lshjob.cli.failures import EXIT_CODES, run_app
from lshjob.cli.failures import ends_cleanly as _fail_cleanly
from lshjob.cli.more_commands import register as register_more
from lshjob.cli.plan_command import register as register_plan
from lshjob.cli.refresh_command import register as register_refresh
from lshjob.cli.report_command import register as register_report
from lshjob.cli.report_command import write_report
from lshjob.cli.run_params import with_run_options
from lshjob.demo.generate import check_options as check_demo_options
from lshjob.demo.generate import write_demo
from lshjob.errors import ParameterError
from lshjob.ingest.spec import EventSpec
from lshjob.jobs import sign as api
from lshjob.jobs.config import load_run_config, merge_settings
from lshjob.jobs.options import RunOptions, run_settings
from lshjob.jobs.options import defaults as run_defaults
from lshjob.jobs.options import required as required_options
from lshjob.jobs.run import run_job
from lshjob.report.text import audit_report, run_report
from lshjob.runtime import stopping
from lshjob.runtime.budget import parse_size
from lshjob.runtime.outputs import demo_folder
from lshjob.runtime.progress import StageProgress
from lshjob.sign.signatures import SignatureParams

app = typer.Typer(
    help=(
        "Build a neighbour index over large collections of sets (MinHash + LSH).\n\n"
        "Example: lshjob demo --out demo-run"
    ),
    no_args_is_help=True,
    add_completion=False,
    epilog=EXIT_CODES,
    context_settings={"help_option_names": ["-h", "--help"]},
    rich_markup_mode=None,
)


def _progress(quiet: bool, as_json: bool) -> StageProgress:
    return StageProgress(enabled=False if (quiet or as_json) else None)


@app.callback(invoke_without_command=True)
def main(
    version: Annotated[bool, typer.Option("--version", help="Print the version and exit.")] = False,
) -> None:
    if version:
        typer.echo(__version__)
        raise typer.Exit(0)


@app.command()
@_fail_cleanly
def sign(
    events: Annotated[str, typer.Argument(help="Event file, glob or directory (Parquet, CSV or NDJSON).")],
    out: Annotated[str, typer.Option("--out", "-o", help="Signature file to write (Parquet).")],
    entity: Annotated[str, typer.Option(help="Column holding the entity key (e.g. patron).")],
    element: Annotated[str, typer.Option(help="Column holding the element key (e.g. title).")],
    count: Annotated[str | None, typer.Option(help="Column with a count or weight per event.")] = None,
    min_count: Annotated[float, typer.Option(help="Keep elements seen at least this often per set.")] = 1,
    segment: Annotated[str | None, typer.Option(help="Column to sign separately by (e.g. branch).")] = None,
    time: Annotated[str | None, typer.Option(help="Column with each event's date/time.")] = None,
    period: Annotated[str | None, typer.Option(help="Sign each day, week or month separately.")] = None,
    perms: Annotated[int, typer.Option(help="Signature length k.")] = 128,
    scheme: Annotated[str, typer.Option(help="kperm (k hashes per element) or oph (one hash, densified).")] = "kperm",
    seed: Annotated[int, typer.Option(help="Seed of the hash family.")] = 1,
    on_null: Annotated[str, typer.Option(help="Null keys: 'error' or 'drop' the row.")] = "error",
    unicode: Annotated[str, typer.Option(
        help="Text keys: 'nfc' (one Unicode normal form) or 'asis' (as given).")] = "nfc",
    memory: Annotated[str | None, typer.Option(
        help="Memory budget, e.g. 8GB; sets that do not fit are grouped and signed an entity key range at a time."
        "  [default: half the machine]")] = None,
    parts: Annotated[int | None, typer.Option(help="Sign the entities in this many key ranges, one at a time.")] = None,
    quiet: Quiet = False,
    as_json: AsJson = False,
) -> None:
    """Sign each entity's set of elements with MinHash.

    Example: lshjob sign demo-run/events.parquet --entity patron --element title
    --time borrowed_at --period month --out sigs.parquet

    Example (larger than memory): lshjob sign loans/ --entity patron --element title
    --memory 4GB --out sigs.parquet
    """
    if parts is not None and parts < 1:
        raise ParameterError(f"--parts must be at least 1; got {parts}")
    spec = EventSpec(
        entity=entity, element=element, count=count, min_count=min_count,
        segment=segment, time=time, period=period, on_null=on_null, unicode=unicode,
    )
    params = SignatureParams(scheme=scheme, perms=perms, seed=seed)
    with _progress(quiet, as_json) as progress:
        summary = api.sign_file(events, out, spec, params, progress,
                                memory=parse_size(memory) if memory else None, parts=parts)
    ing = summary["ingest"]
    text = (
        f"signed {summary['signatures']} sets (k={params.perms}, seed={params.seed}) "
        f"from {ing['rows_read']} events -> {out}"
    )
    if ing["empty_after_filter"]:
        text += (f"\n{ing['empty_after_filter']} set(s) empty after filtering, not signed"
                 f" (e.g. {ing['empty_examples'][0]})")
    if ing["null_rows_dropped"]:
        text += f"\n{ing['null_rows_dropped']} row(s) with null keys dropped"
    _emit(summary, as_json, quiet, text)


@app.command()
@_fail_cleanly
def merge(
    sources: Annotated[list[str], typer.Argument(help="One or more signature files.")],
    out: Annotated[str, typer.Option("--out", "-o", help="Merged signature file to write.")],
    keep: Annotated[
        str, typer.Option(help="Key columns to keep, comma separated; the others are folded together.")
    ] = "entity",
    since: Annotated[str | None, typer.Option(help="First period to include (ISO date).")] = None,
    until: Annotated[str | None, typer.Option(help="Last period to include (ISO date).")] = None,
    memory: Annotated[str | None, typer.Option(
        help="Memory budget, e.g. 8GB; rows that do not fit are merged an entity range at a time."
        "  [default: half the machine]")] = None,
    parts: Annotated[int | None, typer.Option(help="Merge in this many entity key ranges, one at a time.")] = None,
    quiet: Quiet = False,
    as_json: AsJson = False,
) -> None:
    """Fold signatures of segments, periods or files into one per key (element-wise minimum).

    Example (last six months, all branches): lshjob merge sigs.parquet --since 2026-07-01
    --until 2026-12-01 --out recent.parquet

    Example (larger than memory): lshjob merge last-night.parquet today.parquet
    --memory 4GB --out folded.parquet
    """
    if parts is not None and parts < 1:
        raise ParameterError(f"--parts must be at least 1; got {parts}")
    summary = api.merge_files(sources, out, [c.strip() for c in keep.split(",")], since, until,
                              memory=parse_size(memory) if memory else None, parts=parts)
    _emit(summary, as_json, quiet, f"merged {summary['rows_in']} rows into {summary['rows_out']} -> {out}")


register_plan(app)  # plan and calibrate (lshjob.cli.plan_command), listed after merge


@app.command()
@_fail_cleanly
@with_run_options  # the options declared in lshjob.jobs.options
def run(
    config: Annotated[Path | None, typer.Option(help="TOML file with any of these options; flags override it.")] = None,
    quiet: Quiet = False,
    as_json: AsJson = False,
    **flags,
) -> None:
    """Build the neighbour index: ingest, collapse, plan, sign, band, join, verify, publish.

    Example: lshjob run demo_data/loans.parquet --entity patron --element title
    --threshold 0.5 --top-k 20 --out index

    Example (scheduled): lshjob run --config nightly.toml

    Example (sets larger than memory): lshjob run loans/ --entity patron --element title
    --threshold 0.5 --memory 4GB --out index

    Example (band, join and verify on Spark): lshjob run loans/ --entity patron --element title
    --threshold 0.5 --out /shared/index --scratch /shared/tmp --engine spark
    --spark-master spark://master.example:7077

    Example (the whole run on Spark, the index on S3): lshjob run s3a://library-events/loans/
    --entity patron --element title --threshold 0.5 --out s3a://library-indexes/loans --engine spark

    Example (the plan of least predicted seconds, as lshjob plan --plan-by cost chooses it):
    lshjob calibrate; lshjob run loans/ --entity patron --element title --threshold 0.5
    --plan-by cost --out index
    """
    settings = merge_settings(run_defaults(), load_run_config(config) if config else {}, flags)
    missing = [name for name in required_options() if settings.get(name) is None]
    if missing:
        raise ParameterError(f"lshjob run needs {', '.join(missing)} (as options or in --config)")
    events, out, spec, options = run_settings(settings)
    with _progress(quiet, as_json) as progress:
        manifest = run_job(events, spec, options, out, progress, command=sys.argv)
    for warning in manifest.get("warnings", []):  # a lock taken over, leftovers removed
        typer.echo(f"warning: {warning}", err=True)
    _emit(manifest, as_json, quiet, run_report(manifest))


@app.command()
@_fail_cleanly
def audit(
    index: Annotated[str, typer.Argument(
        help="Index folder written by lshjob run: a path, or a URI (s3://, hdfs://, gs://, file://).")],
    events: Annotated[str | None, typer.Option(help="Events to check against (default: the run's input).")] = None,
    sample: Annotated[int, typer.Option(help="Entities to check by brute force.")] = 200,
    seed: Annotated[int, typer.Option(help="Seed for drawing the sample.")] = 0,
    memory: Annotated[str | None, typer.Option(
        help="Memory budget, e.g. 8GB; sets that do not fit are read a key range at a time."
        "  [default: half the machine]")] = None,
    parts: Annotated[int | None, typer.Option(help="Read the entities in this many key ranges, one at a time.")] = None,
    min_recall: Annotated[float | None, typer.Option(
        help="Fail (exit 1) when the measured recall is below this.")] = None,
    quiet: Quiet = False,
    as_json: AsJson = False,
) -> None:
    """Check an index by exact brute force on a sample: recall, predicted recall, wrong pairs.

    Example: lshjob audit index --events demo_data/loans.parquet --sample 300

    Example (a gate after each run): lshjob audit index --sample 1000 --min-recall 0.95

    Example (sets larger than memory): lshjob audit index --sample 2000 --memory 4GB

    Example (an index a Spark run published to S3): lshjob audit s3://library-indexes/loans --sample 500
    """
    if parts is not None and parts < 1:
        raise ParameterError(f"--parts must be at least 1; got {parts}")
    report = audit_index(index, events, sample, seed, memory=parse_size(memory) if memory else None, parts=parts,
                         min_recall=min_recall)
    _emit(report, as_json, quiet, audit_report(report))
    for line in [f"warning: {w}" for w in report["warnings"]] + [f"check failed: {f}" for f in report["failed"]]:
        typer.echo(line, err=True)
    if report["failed"]:
        raise typer.Exit(1)


@app.command()
@_fail_cleanly
def demo(
    out: Annotated[str, typer.Option(
        "--out", "-o", help="Folder for the demo data and results (new, empty or an earlier demo's).")] = "lshjob-demo",
    patrons: Annotated[int, typer.Option(help="Number of patrons to generate.")] = 2000,
    seed: Annotated[int, typer.Option(help="Seed of the generator.")] = 7,
    quiet: Quiet = False,
    as_json: AsJson = False,
) -> None:
    """Generate the library-network demo (patrons, titles, branches, months) and run the job on it.

    Writes DIR/events.parquet and DIR/planted.parquet, signs the patrons
    (DIR/signatures.parquet), builds the index at threshold 0.5 (DIR/index), audits it and
    writes the report page (DIR/report.html).

    Example: lshjob demo --out demo-run --patrons 5000 --seed 3
    """
    check_demo_options(patrons, seed)
    out = demo_folder(out)  # new, empty or an earlier demo's: nothing of the user's replaced
    made = not out.exists()  # a folder made here is removed again if the demo fails
    try:
        data = write_demo(out, patrons, seed)
        spec = EventSpec(entity="patron", element="title")
        with _progress(quiet, as_json) as progress:
            signed = api.sign_file(data["events"], out / "signatures.parquet", spec, progress=progress)
            manifest = run_job(data["events"], spec, RunOptions(threshold=0.5, top_k=20), out / "index", progress)
        checked = audit_index(out / "index", sample=min(300, patrons))
        page = write_report(out / "index", out / "report.html", checked)
    except BaseException:
        if made:
            shutil.rmtree(out, ignore_errors=True)
        raise
    summary = {"data": data, "sign": signed, "run": manifest, "audit": checked, "report": page}
    _emit(
        summary,
        as_json,
        quiet,
        f"wrote {data['rows']} loans by {patrons} patrons to {data['events']}\n"
        f"signed {signed['signatures']} patrons -> {signed['out']}\n\n"
        + run_report(manifest) + "\n\n" + audit_report(checked) + f"\n\nreport: {page['out']}",
    )


@app.command("compile-kernels")
@_fail_cleanly
def compile_kernels(quiet: Quiet = False, as_json: AsJson = False) -> None:
    """Compile lshjob's kernels for this machine now, into the compile cache, so that later
    commands start at once (for an image build or a fresh host). Runs every command on a tiny
    generated data set in a temporary folder; takes about 2.5 minutes on 2 cores the first time.

    The cache folder is LSHJOB_CACHE_DIR (or NUMBA_CACHE_DIR) when set, else numba's default.

    Example: lshjob compile-kernels --json

    Example (an image build, own cache folder): LSHJOB_CACHE_DIR=/opt/lshjob-cache
    lshjob compile-kernels
    """
    from lshjob.jobs.workload import fill_cache

    summary = fill_cache()
    n = len(summary["compiled"])
    text = (f"compiled {summary['kernels_compiled']} kernels ({n} type signatures) in {summary['seconds']} s; "
            if n else "every kernel was already compiled for this machine; ")
    _emit(summary, as_json, quiet, text + f"cache in {summary['cache_dir']}")


register_refresh(app)  # refresh and history (lshjob.cli.refresh_command)
register_more(app)  # diff and drift (lshjob.cli.more_commands)
register_report(app)  # report (lshjob.cli.report_command)

for _command in app.registered_commands:  # every command's --help ends with the exit codes
    _command.epilog = _command.epilog or EXIT_CODES


def entry_point() -> None:
    """What the console script ``lshjob`` (lshjob.cli.console) runs, after taking over the stop
    signals; ``python -m lshjob.cli.app`` takes them over here. Ends the process without the
    interpreter's teardown, after flushing: unloading numba's compiled code at exit costs
    about 0.3 s a command (measured), and by then every output is written, closed and renamed
    into place. A reader that closed stdout early (``lshjob ... | head``) changes nothing."""
    stopping.install()
    try:
        _skip_blas_probe()
        code = run_app(app, sys.argv[1:])
    except stopping.Stopped as stop:  # outside any command
        code = stopping.say(stop, sys.argv[1:])
    stopping.say_if_late(code)
    stopping.flush_and_exit(code)


if __name__ == "__main__":
    entry_point()
