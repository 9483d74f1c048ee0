"""The ``reduce audit`` command: a pre-publish size audit of payload files already written.

The report goes to stdout (a table, ``--json`` or ``--markdown``); every finding is also one
``PATH: problem`` line on stderr so CI logs show it; an interrupted commit the audit
completed first is one ``JOURNAL: completed ...`` line there too. Exit codes: 0 all fine,
1 a file is inconsistent, a file or total is over budget, or an interrupted commit could not
be completed; 2 bad input (missing or unreadable path, a FIFO, device or file over the size
cap, malformed budgets file, bad size or measure). Errors are one ``error: ...`` line on
stderr, never a traceback.
"""

from __future__ import annotations

import click

from reduce.audit import audit_paths, render_markdown, render_table, report_to_json
from reduce.errors import AuditError, ReduceError

__all__ = ["audit"]


@click.command("audit")
@click.argument("paths", nargs=-1, metavar="PATH...")
@click.option(
    "--budget",
    metavar="SIZE",
    help="Byte budget for every file, e.g. 300KB, 1.5MB, 200KiB.",
)
@click.option(
    "--on",
    "on",
    default="gzip",
    show_default=True,
    metavar="[raw|gzip|brotli]",
    help="Measure that --budget and --total apply to.",
)
@click.option(
    "--budgets",
    "budgets_file",
    metavar="FILE",
    help="TOML file of [[file]] glob/max/on entries and an optional [total].",
)
@click.option("--total", metavar="SIZE", help="Budget for the sum over all audited files.")
@click.option(
    "--brotli",
    "force_brotli",
    is_flag=True,
    help="Measure brotli (quality 11) for every file; by default only up to 1 MB.",
)
@click.option("--json", "as_json", is_flag=True, help="Print the report as JSON.")
@click.option("--markdown", is_flag=True, help="Print the report as Markdown for a pull request.")
@click.option("--quiet", "-q", is_flag=True, help="No report; only problem lines and exit code.")
@click.pass_context
def audit(
    ctx: click.Context,
    paths: tuple[str, ...],
    budget: str | None,
    on: str,
    budgets_file: str | None,
    total: str | None,
    force_brotli: bool,
    as_json: bool,
    markdown: bool,
    quiet: bool,
) -> None:
    """Audit payload files (or folders, walked recursively) before publishing them.

    Reports raw, gzip and brotli bytes, rows and drawn elements, bytes per column, numbers
    with more than 6 decimals, a drawing-surface hint and a transfer estimate on a slow
    link (1 Mbit/s assumed); checks reduce.columns/1 payloads against their contract and
    manifest; applies byte budgets.
    """
    try:
        if as_json and markdown:
            raise AuditError("--json and --markdown cannot be combined; choose one")
        report = audit_paths(
            paths,
            budget=budget,
            on=on,
            budgets_file=budgets_file,
            total=total,
            brotli=force_brotli,
        )
    except ReduceError as err:
        click.echo(f"error: {err.message}", err=True)
        ctx.exit(err.exit_code)
        return

    if not quiet:
        if as_json:
            click.echo(report_to_json(report).decode("utf-8"), nl=False)
        elif markdown:
            click.echo(render_markdown(report), nl=False)
        else:
            click.echo(render_table(report), nl=False)
    for commit in report.commits:
        if commit.completed:  # said in one line; an uncompleted one is a finding below
            click.echo(f"{commit.journal}: {commit.message}", err=True)
    for path, message in report.findings:
        click.echo(f"{path}: {message}", err=True)
    if not report.ok:
        ctx.exit(1)
