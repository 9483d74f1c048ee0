"""The command line: a thin click layer over the library.

Each command parses its options, calls one library function, and prints. Every
:class:`~reduce.errors.ReduceError` becomes one line on stderr and its exit code, here and
nowhere else (``--debug`` shows the traceback instead). Exit codes: 0 ok; 1 a budget cannot
be met (or an audit finds a file over budget or inconsistent); 2 bad recipe or input;
3 an internal error (a bug: rerun with --debug and report it).
"""

from __future__ import annotations

import contextlib
import os
import sys
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import click
import orjson

from reduce._version import __version__
from reduce.errors import OptionError, RecipeError, ReduceError
from reduce.sizes import MEASURES, parse_measure, parse_size


def _option_name(param: click.Parameter | None) -> str:
    """How an error names the option: its longest flag (``--budget``), else its name."""
    if isinstance(param, click.Option) and param.opts:
        return max(param.opts, key=len)
    return (param.name if param is not None else None) or "value"


class _SizeType(click.ParamType):  # type: ignore[type-arg]
    """A byte size: 300KB, 1.5MB (decimal), 200KiB (IEC 80000-13), or plain bytes.

    A bad value raises :class:`OptionError`, so it is one ``error: --budget: ...`` line and
    exit code 2 like every other bad input, not click's multi-line usage error."""

    name = "size"

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None) -> int:
        if isinstance(value, int) and not isinstance(value, bool):
            return value
        try:
            return parse_size(value)
        except ValueError as e:
            raise OptionError(f"{_option_name(param)}: {e}") from None


class _MeasureType(click.ParamType):  # type: ignore[type-arg]
    """A size measure: raw, gzip or brotli (a bad one is one line, as for :data:`SIZE`)."""

    name = "measure"

    def get_metavar(self, param: click.Parameter, ctx: click.Context) -> str:
        return "[" + "|".join(MEASURES) + "]"

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None) -> str:
        try:
            return parse_measure(value)
        except ValueError as e:
            raise OptionError(f"{_option_name(param)}: {e}") from None

    def shell_complete(
        self, ctx: click.Context, param: click.Parameter, incomplete: str
    ) -> list[Any]:
        from click.shell_completion import CompletionItem

        return [CompletionItem(m) for m in MEASURES if m.startswith(incomplete)]


SIZE = _SizeType()
MEASURE = _MeasureType()


class Terminated(KeyboardInterrupt):
    """SIGTERM (what schedulers and ``kill`` send) raised in the main thread, so it unwinds
    like Ctrl-C: every ``finally`` and clean-up runs (temporary and spill files removed)."""


# A SIGTERM that arrived inside polars' own Python code is raised a little later: that code
# may be a callback of polars' native code, where an exception becomes a panic (a native
# backtrace and exit 1) instead of unwinding.
_RETRY_SECONDS = 0.05
_retry: Any = None


def _on_sigterm(signum: int, frame: Any) -> None:
    global _retry
    import os
    import threading

    where = frame.f_code.co_filename.replace("\\", "/") if frame is not None else ""
    if "/polars/" in where:
        if _retry is None or not _retry.is_alive():
            _retry = threading.Timer(_RETRY_SECONDS, os.kill, (os.getpid(), signum))
            _retry.daemon = True
            _retry.start()
        return
    raise Terminated


@contextlib.contextmanager
def _sigterm_unwinds() -> Iterator[None]:
    """SIGTERM raises :class:`Terminated` while a command runs (main thread only)."""
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGTERM, _on_sigterm)
    try:
        yield
    finally:
        if _retry is not None:
            _retry.cancel()
        signal.signal(signal.SIGTERM, previous)


@contextlib.contextmanager
def _cache_warnings_as_lines() -> Iterator[None]:
    """A damaged cache entry (``reduce.cache.CacheWarning``) is one ``warning:`` line on
    stderr, even with --quiet; other warnings keep Python's default handling."""
    import warnings

    with warnings.catch_warnings():
        default = warnings.showwarning

        def show(
            message: Warning | str, category: type[Warning], *args: Any, **kwargs: Any
        ) -> None:
            if category.__name__ == "CacheWarning":
                click.echo(f"warning: {message}", err=True)
            else:
                default(message, category, *args, **kwargs)

        warnings.showwarning = show
        warnings.filterwarnings("always", message="cache entry ")
        yield


class _Group(click.Group):
    # Commands imported only when used, so `reduce run` does not pay for the audit's imports.
    _lazy = {"audit": ("reduce.audit.cli", "audit")}

    def list_commands(self, ctx: click.Context) -> list[str]:
        return sorted([*super().list_commands(ctx), *self._lazy])

    def get_command(self, ctx: click.Context, cmd_name: str) -> click.Command | None:
        if cmd_name in self._lazy and cmd_name not in self.commands:
            import importlib

            module, attr = self._lazy[cmd_name]
            self.add_command(getattr(importlib.import_module(module), attr))
        return super().get_command(ctx, cmd_name)

    def invoke(self, ctx: click.Context) -> Any:
        with _sigterm_unwinds(), _cache_warnings_as_lines():
            return self._invoke(ctx)

    def _invoke(self, ctx: click.Context) -> Any:
        try:
            return super().invoke(ctx)
        except Terminated:
            click.echo(
                "error: terminated (SIGTERM); nothing was published by the unfinished step",
                err=True,
            )
            ctx.exit(143)  # 128 + SIGTERM, the shell's convention
        except ReduceError as e:
            if ctx.obj and ctx.obj.get("debug"):
                raise
            click.echo(error_line(e), err=True)
            ctx.exit(e.exit_code)
        except KeyboardInterrupt:
            click.echo("error: interrupted; nothing was published by the unfinished step", err=True)
            ctx.exit(130)
        except (click.exceptions.Exit, click.ClickException, click.Abort):
            raise
        except Exception as e:  # a bug: say so in one line
            if ctx.obj and ctx.obj.get("debug"):
                raise
            first = (str(e).strip().splitlines() or [""])[0]
            click.echo(
                f"error: internal error ({type(e).__name__}: {first}); rerun with "
                "--debug and report it",
                err=True,
            )
            ctx.exit(3)


def error_line(e: ReduceError) -> str:
    """The one line on stderr for an error."""
    return f"error: {e.message}"


def _fail_on(report: Any) -> None:
    """Print every problem of a :class:`reduce.validate.CheckReport`, one line each, and exit
    with the highest exit code among them (nothing published)."""
    if not report.ok:
        for e in report.errors:
            click.echo(error_line(e), err=True)
        sys.exit(report.exit_code)


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="reduce")
@click.option("--debug", is_flag=True, help="Show tracebacks instead of one-line errors.")
@click.pass_context
def main(ctx: click.Context, debug: bool) -> None:
    """Shrink big event tables into browser-sized payloads that fit a byte budget."""
    ctx.ensure_object(dict)
    ctx.obj["debug"] = debug


@contextlib.contextmanager
def _progress(quiet: bool) -> Iterator[Callable[[str], None]]:
    """A status line on a terminal (stderr); silent with --quiet or when not a terminal."""
    if quiet or not sys.stderr.isatty() or os.environ.get("CI"):
        yield lambda _msg: None
        return
    from rich.console import Console

    console = Console(stderr=True)
    # A slow refresh: the spinner thread must not compete with the pipeline for the GIL.
    with console.status("starting", refresh_per_second=2) as status:
        yield lambda msg: status.update(msg)


def _overrides(sets: tuple[str, ...]) -> dict[str, str]:
    from reduce.recipe import parse_override

    return dict(parse_override(s) for s in sets)


_BUDGET_OPTS = [
    click.option(
        "--budget",
        "budget_max",
        type=SIZE,
        default=None,
        help="Byte budget, e.g. 300KB, 1.5MB, 200KiB (overrides budget.max).",
    ),
    click.option(
        "--on",
        type=MEASURE,
        default=None,
        help="Measure the budget applies to (overrides budget.on).",
    ),
    click.option(
        "--set",
        "sets",
        multiple=True,
        metavar="KEY=VALUE",
        help="Override any recipe key, e.g. --set prune.top.k=[10,5]. Repeatable.",
    ),
    click.option(
        "--no-cache", is_flag=True, help="Neither read nor write the cached finest partial."
    ),
    click.option("--quiet", "-q", is_flag=True, help="No progress output."),
]


def _budget_opts(f: Callable[..., Any]) -> Callable[..., Any]:
    for opt in reversed(_BUDGET_OPTS):
        f = opt(f)
    return f


@main.command("run")
@click.argument("recipes", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option(
    "--out",
    "out_dir",
    type=click.Path(path_type=Path),
    default=None,
    help="Write payloads into this folder (default: output.path).",
)
@click.option(
    "--write-anyway",
    is_flag=True,
    help="When nothing fits, write the smallest payload anyway (still exit 1).",
)
@click.option("--json", "as_json", is_flag=True, help="Print a JSON summary.")
@click.option(
    "--cluster",
    "cluster_address",
    envvar="REDUCE_CLUSTER",
    default=None,
    metavar="ADDRESS",
    help="Scan the source files on a Dask cluster: a scheduler address "
    "(tcp://host:8786) or local:N (N local workers for this run); needs "
    "pip install 'reduce[cluster]' and the files at the same paths on every "
    "worker. Default: $REDUCE_CLUSTER.",
)
@_budget_opts
def run_cmd(
    recipes: tuple[Path, ...],
    out_dir: Path | None,
    write_anyway: bool,
    as_json: bool,
    cluster_address: str | None,
    budget_max: int | None,
    on: str | None,
    sets: tuple[str, ...],
    no_cache: bool,
    quiet: bool,
) -> None:
    """Run recipes: fit each to its budget and write payload and manifest."""
    from reduce import cluster, report
    from reduce.pipeline import run
    from reduce.validate import check

    over = _overrides(sets)
    checked = check(recipes, overrides=over, outputs=True, out_dir=out_dir)
    _fail_on(checked)  # every recipe, source and output checked before any is published
    loaded = checked.recipes
    summaries = []
    over_budget = False
    with _progress(quiet or as_json) as progress, cluster.using(cluster_address):
        for rec in loaded:
            res = run(
                rec,
                out_dir=out_dir,
                budget=budget_max,
                on=on,
                write_anyway=write_anyway,
                use_cache=not no_cache,
                progress=progress,
            )
            if as_json:
                summaries.append(report.run_json(res))
            elif not quiet:
                click.echo(report.run_line(res))
            # Warnings go to stderr in every mode: --quiet and --json hide progress, not them.
            for line in report.run_warnings(res):
                click.echo(line, err=True)
            if res.over_budget:
                from reduce.pipeline import smallest_message

                over_budget = True
                click.echo(f"error: {smallest_message(res.fit)}", err=True)
    if as_json:
        click.echo(orjson.dumps(summaries, option=orjson.OPT_INDENT_2).decode())
    if over_budget:  # --write-anyway wrote something, but the budget was not met
        sys.exit(1)


@main.command("ladder")
@click.argument("recipe", type=click.Path(path_type=Path))
@click.option(
    "--order",
    default=None,
    metavar="AXES",
    help="Comma-separated axes, first gives up detail first (overrides budget.order).",
)
@click.option("--all", "every", is_flag=True, help="Evaluate every combination of levels.")
@click.option(
    "--exact",
    is_flag=True,
    help="Measure raw, gzip and brotli bytes of every level shown (slower; by default a "
    "level the search judged from cheap evidence shows that estimate, marked ~).",
)
@click.option("--json", "as_json", is_flag=True, help="Print the frontier as JSON.")
@click.option(
    "--page",
    "page",
    type=click.Path(path_type=Path),
    default=None,
    help="Also write an HTML page showing every candidate level with its picture.",
)
@_budget_opts
def ladder_cmd(
    recipe: Path,
    order: str | None,
    every: bool,
    exact: bool,
    as_json: bool,
    budget_max: int | None,
    on: str | None,
    sets: tuple[str, ...],
    no_cache: bool,
    quiet: bool,
    page: Path | None = None,
) -> None:
    """Show every candidate level evaluated: rows, drawn elements, bytes, fits or not.

    Levels the search judged from cheap evidence (a sample, a fast compression, rows times
    bytes per row) show that estimate, marked ~; the chosen level is always exact. On a warm
    cache the figures come from the store of measured levels, without measuring again.
    --exact measures every level shown."""
    from reduce import report
    from reduce.pipeline import ladder

    order_list = [a.strip() for a in order.split(",") if a.strip()] if order else None
    if order is not None and not order_list:
        raise RecipeError("--order: list axes separated by commas, e.g. --order top,time,hex")
    if page is not None:
        from reduce.ladder_page import check_page_target

        check_page_target(page)
    with _progress(quiet or as_json) as progress:
        res = ladder(
            recipe,
            budget=budget_max,
            on=on,
            order=order_list,
            overrides=_overrides(sets),
            use_cache=not no_cache,
            every_level=every,
            exact=exact,
            progress=progress,
        )
    if page is not None:
        from reduce.ladder_page import write_ladder_page

        with _progress(quiet or as_json) as progress:
            write_ladder_page(res, page, progress=progress)
    if as_json:
        click.echo(report.ladder_json(res).decode())
    else:
        click.echo(report.ladder_table(res))
        if page is not None:
            click.echo(f"page: {report.shown(page)}")
    if res.level is None:
        from reduce.pipeline import smallest_message

        click.echo(f"note: {smallest_message(res)}", err=True)


@main.command("check")
@click.argument("recipes", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option(
    "--set",
    "sets",
    multiple=True,
    metavar="KEY=VALUE",
    help="Override any recipe key before checking.",
)
def check_cmd(recipes: tuple[Path, ...], sets: tuple[str, ...]) -> None:
    """Validate recipes and their sources' schemas without scanning the data."""
    from reduce import report
    from reduce.validate import check

    checked = check(recipes, overrides=_overrides(sets))
    for c in checked.results:
        if c.error is None and c.recipe is not None:
            click.echo(report.check_line(c.file, c.recipe.name, c.source_files, c.columns))
    _fail_on(checked)  # every problem of every recipe, one line each


@main.command("demo")
@click.option(
    "--out",
    "out_dir",
    type=click.Path(file_okay=False, path_type=Path),
    default=Path("out"),
    show_default=True,
    help="Folder for the demo payloads.",
)
@click.option(
    "--rows",
    type=click.IntRange(1000, 50_000_000),
    default=None,
    help="Rows of demo events to generate (default 2,000,000).",
)
@click.option("--regenerate", is_flag=True, help="Generate the demo data again.")
@click.option("--quiet", "-q", is_flag=True, help="No progress output.")
def demo_cmd(out_dir: Path, rows: int | None, regenerate: bool, quiet: bool) -> None:
    """Generate the demo scenario (if absent) and run every demo recipe."""
    from reduce import demo, report

    with _progress(quiet) as progress:
        results, seconds = demo.run_demo(
            out_dir=out_dir, rows=rows, regenerate=regenerate, progress=progress, echo=click.echo
        )
    for res in results:
        click.echo(report.run_line(res))
    click.echo(f"demo: {len(results)} recipes in {seconds:.1f} s; payloads in {out_dir}")


@main.command("preview")
@click.argument("payloads", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option(
    "--out",
    "out_dir",
    type=click.Path(file_okay=False, path_type=Path),
    default=None,
    help="Write the pictures and pages here (default: beside each payload).",
)
@click.option(
    "--measure",
    is_flag=True,
    help="Open each page in headless Chromium; report parse and draw ms (median of 3 loads).",
)
@click.option(
    "--reader", is_flag=True, help="Also write columns-reader.js, the page-side payload reader."
)
@click.option("--json", "as_json", is_flag=True, help="Print a JSON summary.")
@click.option("--quiet", "-q", is_flag=True, help="No progress output.")
def preview_cmd(
    payloads: tuple[Path, ...],
    out_dir: Path | None,
    measure: bool,
    reader: bool,
    as_json: bool,
    quiet: bool = False,
) -> None:
    """Write STEM.png (a static picture) and STEM.html (a page drawing it) per payload."""
    from reduce import report
    from reduce.preview import expand_payloads, write_previews

    files = expand_payloads(payloads)
    if measure:
        from reduce.browser import browser_paths

        browser_paths()  # no browser: one line saying how to install it, before any work
    with _progress(quiet or as_json) as progress:
        previews = []
        for i, p in enumerate(files):
            progress(f"drawing {p.name} ({i + 1} of {len(files)})")
            previews.append(write_previews(p, out_dir=out_dir, reader=reader))
        if measure:
            from reduce.browser import measure_pages

            progress(f"timing {len(previews)} pages in headless Chromium (3 loads each)")
            for pv, m in zip(previews, measure_pages([pv.html for pv in previews])):
                pv.timings = m
    if as_json:
        click.echo(report.preview_json(previews).decode())
    else:
        for pv in previews:
            click.echo(report.preview_line(pv))


@main.command("schema")
@click.argument("kind", type=click.Choice(["recipe", "payload", "manifest"]))
def schema_cmd(kind: str) -> None:
    """Print the JSON Schema (draft 2020-12) of a recipe, a payload or a manifest."""
    from reduce.schema import SCHEMAS

    click.echo(orjson.dumps(SCHEMAS[kind](), option=orjson.OPT_INDENT_2).decode())
