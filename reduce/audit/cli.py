"""The ``reduce audit`` command: a pre-publish size audit of payload files already written.

The report goes to stdout (a table, ``--json`` or ``--markdown``); every finding is also one
``PATH: problem`` line on stderr so CI logs show it; an interrupted commit the audit
completed first is one ``JOURNAL: completed ...`` line there too. Exit codes: 0 all fine,
1 a file is inconsistent, a file or total is over budget, or an interrupted commit could not
be completed; 2 bad input (missing or unreadable path, a FIFO, device or file over the size
cap, malformed budgets file, bad size or measure). Errors are one ``error: ...`` line on
stderr, never a traceback: ``--budget``/``--total``/``--on`` use the shared option types of
:mod:`reduce.cli`, and every ``ReduceError`` is printed by the one handler there.
"""

from __future__ import annotations

import click

from reduce.audit import audit_paths, render_markdown, render_table, report_to_json
from reduce.cli import MEASURE, SIZE
from reduce.errors import AuditError

__all__ = ["audit"]


@click.command("audit")
@click.argument("paths", nargs=-1, metavar="PATH...")
@click.option(
    "--budget",
    type=SIZE,
    metavar="SIZE",
    help="Byte budget for every file, e.g. 300KB, 1.5MB, 200KiB.",
)
@click.option(
    "--on",
    "on",
    type=MEASURE,
    default="gzip",
    show_default=True,
    help="Measure that --budget and --total apply to.",
)
@click.option(
    "--budgets",
    "budgets_file",
    metavar="FILE",
    help="TOML file of [[file]] glob/max/on entries and an optional [total].",
)
@click.option(
    "--total", type=SIZE, metavar="SIZE", help="Budget for the sum over all audited files."
)
@click.option(
    "--brotli",
    "force_brotli",
    is_flag=True,
    help="Measure brotli (quality 11) for every file; by default only up to 1 MB.",
)
@click.option("--json", "as_json", is_flag=True, help="Print the report as JSON.")
@click.option("--markdown", is_flag=True, help="Print the report as Markdown for a pull request.")
@click.option("--quiet", "-q", is_flag=True, help="No report; only problem lines and exit code.")
@click.option(
    "--measure",
    is_flag=True,
    help="Draw each payload's preview page in headless Chromium and report parse "
    "and draw ms (median of 3 loads).",
)
@click.option(
    "--max-draw-ms",
    type=click.FloatRange(min=0, min_open=True),
    default=None,
    metavar="MS",
    help="With --measure: a file whose page draws slower is a finding.",
)
@click.pass_context
def audit(
    ctx: click.Context,
    paths: tuple[str, ...],
    budget: int | None,
    on: str,
    budgets_file: str | None,
    total: int | None,
    force_brotli: bool,
    as_json: bool,
    markdown: bool,
    quiet: bool,
    measure: bool,
    max_draw_ms: float | None,
) -> None:
    """Audit payload files (or folders, walked recursively) before publishing them.

    Reports raw, gzip and brotli bytes, rows and drawn elements, bytes per column, numbers
    with more than 6 decimals, a drawing-surface hint and a transfer estimate on a slow
    link (1 Mbit/s assumed); checks reduce.columns/1 payloads against their contract and
    manifest; applies byte budgets.
    """
    # A ReduceError (bad input) propagates to reduce.cli's group: one line, its exit code.
    measured: dict[str, dict[str, object]] = {}
    if as_json and markdown:
        raise AuditError("--json and --markdown cannot be combined; choose one")
    if max_draw_ms is not None and not measure:
        raise AuditError("--max-draw-ms needs --measure (the pages are drawn to time them)")
    if measure:
        from reduce.browser import browser_paths

        browser_paths()  # no browser: the line saying how to install it, exit 2
    report = audit_paths(
        paths,
        budget=budget,
        on=on,
        budgets_file=budgets_file,
        total=total,
        brotli=force_brotli,
    )
    if measure:
        from pathlib import Path

        from reduce.browser import measure_payloads

        got = measure_payloads([Path(f.path) for f in report.files])
        measured = {str(p): m for p, m in got.items()}

    slow = [
        (path, m)
        for path, m in measured.items()
        if max_draw_ms is not None and float(m["draw_ms"]) > max_draw_ms  # type: ignore[arg-type]
    ]
    if not quiet:
        if as_json:
            import orjson

            doc = orjson.loads(report_to_json(report))
            for entry in doc.get("files", []):
                if entry.get("path") in measured:
                    entry["measured"] = measured[entry["path"]]
            if measure:
                doc["max_draw_ms"] = max_draw_ms
                doc["findings"] += [
                    {"path": path, "message": _slow_message(m, max_draw_ms)} for path, m in slow
                ]
                doc["ok"] = doc["ok"] and not slow
            click.echo(orjson.dumps(doc, option=orjson.OPT_INDENT_2).decode("utf-8"))
        else:
            text = render_markdown(report) if markdown else render_table(report)
            click.echo(text, nl=False)
            if measured:
                click.echo("measured in headless Chromium (median of 3 loads of the preview page):")
                for path, m in measured.items():
                    click.echo(
                        f"  {path}: {m['surface']}, {m['drawn']:,} elements, parse "
                        f"{m['parse_ms']:.1f} ms, draw {m['draw_ms']:.1f} ms"
                    )
    for commit in report.commits:
        if commit.completed:  # said in one line; an uncompleted one is a finding below
            click.echo(f"{commit.journal}: {commit.message}", err=True)
    for path, message in report.findings:
        click.echo(f"{path}: {message}", err=True)
    for path, m in slow:
        click.echo(f"{path}: {_slow_message(m, max_draw_ms)}", err=True)
    if not report.ok or slow:
        ctx.exit(1)


def _slow_message(m: dict[str, object], limit: float | None) -> str:
    return f"page draws in {float(m['draw_ms']):.1f} ms > --max-draw-ms {limit:g} ms"  # type: ignore[arg-type]
