"""``sheetview batch`` (measure many structures, resumable) and ``sheetview trend``."""
from __future__ import annotations

import sys

import click

from ..errors import OptionError
from .common import at_options, read_kwargs, read_options
from .conventions import command, force_option, output_option, quiet_option
from .measure import SETTINGS, measure_options, measure_settings, only_help
from ..batch import run_batch, trend_plot


@command("batch")
@click.argument("inputs", nargs=-1, required=True, metavar="PATHS_OR_GLOBS...")
@output_option("folder", "Batch folder: per-structure reports, summary tables, index.html, "
               "log. Reusing it resumes: finished structures are skipped.", required=True,
               dest="out")
@click.option("--only", default=None, metavar="NAMES",
              help=only_help("Comma-separated measures (default: all that apply to each "
                             "input)."))
@measure_options
@click.option("--workers", type=int, default=1, show_default=True, metavar="N",
              help="Structures measured at once: this process and N - 1 worker processes "
                   "(numba threads per worker: cores / N); with --cluster local, the number "
                   "of Dask workers.")
@click.option("--threads", type=int, default=None, metavar="N",
              help="Numba threads per local worker (default: all cores with 1 worker, "
                   "else cores / workers).")
@click.option("--cluster", default=None, metavar="ADDRESS",
              help="Send the work to a running Dask scheduler (e.g. tcp://host:8786), or "
                   "'local' to start a Dask LocalCluster. Inputs and the output folder must "
                   "be visible to the workers at the same paths.")
@click.option("--no-plots", is_flag=True, help="Tables only in the report folders, no PNG.")
@click.option("--no-html", is_flag=True, help="No HTML pages (report.html, index.html).")
@quiet_option("No progress on stderr (the log is kept).")
@at_options
@read_options
def batch(inputs, out, only, workers, threads, cluster, no_plots, no_html, quiet, at_progress,
          at_time, **kw):
    """Measure every structure of PATHS_OR_GLOBS... with the same settings into OUT.

    The measure options are those of `sheetview measure`, with the same names, defaults
    and meaning; each structure gets exactly the numbers `sheetview measure FILE` gives.

    Each result is kept under OUT/runs/, keyed by the SHA-256 of the input's content
    and the settings; rerunning the same command skips finished structures (a run
    that was killed resumes where it stopped). OUT/summary.csv and summary.parquet
    get one row per input with flat dotted columns (descriptors, settings, the
    file's header metadata); OUT/index.html links a page per structure.

    An input that cannot be measured is recorded (OUT/failed/, the summary's error
    column) and the batch goes on. Exit status: 0 all measured, 1 if any input
    failed, 2 for a usage error (bad option, unwritable OUT).
    """
    opts = {k: kw.pop(k) for k in SETTINGS}
    read_kw = read_kwargs(kw)
    settings = measure_settings(**opts, spacing=read_kw.get("spacing"))
    if workers < 1:
        raise OptionError(f"must be at least 1, got {workers}", param="workers")
    if threads is not None and threads < 1:
        raise OptionError(f"must be at least 1, got {threads}", param="threads")
    res = run_batch(list(inputs), out, settings, read_kw, only=only, plots=not no_plots,
                    workers=workers, cluster=cluster, html_pages=not no_html, quiet=quiet,
                    echo=lambda m: click.echo(m, err=True), threads=threads,
                    fork_warm=True, at={"progress": at_progress, "time": at_time})
    click.echo(f"{len(res.records)} input(s): {res.n_done} measured, {res.n_skipped} "
               f"finished before, {res.n_failed} failed; summary {res.out / 'summary.csv'}")
    for r in res.failed:
        click.echo(f"  failed: {(r['error'] or '').splitlines()[0]}")
    if res.n_failed:
        sys.exit(1)


@command("trend")
@click.argument("summary", metavar="SUMMARY", type=click.Path(dir_okay=False))
@click.option("--x", "x", required=True, metavar="COLUMN", help="Column on the x axis.")
@click.option("--y", "y", required=True, metavar="COLUMN", help="Numeric column on the y axis.")
@click.option("--group", default=None, metavar="COLUMN", help="One line per value of this column.")
@output_option("file", "The plot to write (PNG).", required=True, dest="out")
@force_option("Overwrite an existing plot.")
def trend(summary, x, y, group, out, force):
    """Plot column Y of a batch SUMMARY (summary.csv or .parquet) against column X.

    Rows with the same X (and GROUP) are replicas: drawn as their mean with error
    bars of one sample standard deviation. Columns are the dotted names of the
    summary header, e.g. input_metadata.synth.n_stacks or volume_fractions.solid.
    """
    stats = trend_plot(summary, x, y, out, group=group, force=force)
    for g, (xs, m, s, n) in stats.items():
        label = "" if group is None else f"{group} = {g}: "
        click.echo(label + "; ".join(f"{xv}: {mv:.4g} ± {sv:.2g} (n={nv})"
                                     for xv, mv, sv, nv in zip(xs, m, s, n)))
    click.echo(f"plot written to {out}")


COMMANDS = [batch, trend]
