"""Recipe fuzzing: whatever a recipe document holds, the user gets a one-line error, not a crash.

A hypothesis strategy draws recipe documents from the recipe schema: mostly valid recipes
(random subsets of the tables source, group, measures, normalize, prune, budget, output and
of their keys, consistent with each other and with the event table), sometimes wild ones
(plausible values mixed with values of every TOML type: strings with any unicode, integers
of any size, floats with nan and inf, booleans, offset and local date-times, dates, times,
lists, nested tables, empty values). It then mutates them up to three times (drops a key,
misspells a key, puts a value of the wrong type, an out-of-range number or an edge value
such as a time-zone folder name or a 300-character name), writes them as TOML with a small
emitter of our own, and feeds each document to

- ``reduce.load_recipe``: it returns a recipe or raises a ``ReduceError`` (a
  ``RecipeError`` for recipe problems), never ``TypeError``, ``KeyError``, ``OSError`` ...;
- ``reduce check`` (click's CliRunner), sometimes with a ``--set key=value`` override: it
  exits 0 or 2, never 3 (internal error), with no traceback and, on failure, one line.

The working folder holds a real event table and denominators file, so that documents naming
them go on to the schema, filter and denominator checks. 2,000 documents in all, derived from
a fixed seed (``derandomize``), so a failure is reproducible. Every kind of crash found is
reported at the end, each with a document shrunk by removing keys while the crash remains.
"""

from __future__ import annotations

import copy
import datetime as dt
import math
import re
import traceback
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import reduce
from reduce.cli import main
from reduce.errors import ReduceError
from tests._builders import events

pytestmark = pytest.mark.slow

EXAMPLES = 2000

# --------------------------------------------------------------------------------------------
# A TOML emitter (the standard library reads TOML but does not write it; tomli_w is not a
# dependency). Strings are basic strings with every character TOML requires escaped.
# --------------------------------------------------------------------------------------------

_ESCAPES = {
    '"': '\\"',
    "\\": "\\\\",
    "\b": "\\b",
    "\t": "\\t",
    "\n": "\\n",
    "\f": "\\f",
    "\r": "\\r",
}


def toml_string(s: str) -> str:
    out = []
    for ch in s:
        if ch in _ESCAPES:
            out.append(_ESCAPES[ch])
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04x}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def toml_key(k: str) -> str:
    bare = k and all(c.isascii() and (c.isalnum() or c in "_-") for c in k)
    return k if bare else toml_string(k)


def toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return toml_string(v)
    if isinstance(v, (dt.datetime, dt.date, dt.time)):
        return v.isoformat()
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{toml_key(k)} = {toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(type(v).__name__)


def to_toml(doc: dict[str, Any]) -> str:
    lines = [f"{toml_key(k)} = {toml_value(v)}" for k, v in doc.items() if not isinstance(v, dict)]
    for k, v in doc.items():
        if isinstance(v, dict):
            lines.append(f"[{toml_key(k)}]")
            lines += [f"{toml_key(kk)} = {toml_value(vv)}" for kk, vv in v.items()]
    return "\n".join(lines) + "\n"


def test_emitter_round_trips_awkward_values() -> None:
    """Guard for the fuzz below: the emitter writes what tomllib reads back."""
    import tomllib

    doc = {
        "a": 'q"\\\x00\x1f\x7f\u2028😀',
        "b": [1, -(2**70), 1.5, -0.0, True],
        "c": {
            "d e": {
                "f": dt.datetime(2025, 3, 1, 4, 5, 6, 7, tzinfo=dt.timezone(dt.timedelta(hours=-7)))
            },
            "g": [dt.date(1, 1, 1), dt.time(23, 59, 59, 999999)],
            "": {},
        },
    }
    assert tomllib.loads(to_toml(doc)) == doc
    assert math.isnan(tomllib.loads(to_toml({"x": float("nan")}))["x"])


# --------------------------------------------------------------------------------------------
# Strategies
# --------------------------------------------------------------------------------------------

TEXT = st.text(st.characters(blacklist_categories=("Cs",)), max_size=12)
LONG_TEXT = st.builds(
    lambda c, n: c * n, st.sampled_from(["x", "é", "/", "a/"]), st.integers(200, 400)
)
INTS = st.one_of(
    st.integers(-3, 20),
    st.integers(-(2**63), 2**63 - 1),
    st.sampled_from([2**63, -(2**63) - 1, 10**30, -(10**30)]),
)
FLOATS = st.floats(allow_nan=True, allow_infinity=True)
ZONES = st.datetimes(
    timezones=st.sampled_from(
        [
            dt.UTC,
            dt.timezone(dt.timedelta(hours=5)),
            dt.timezone(dt.timedelta(hours=-9, minutes=-30)),
        ]
    )
)
SCALARS = st.one_of(
    TEXT, INTS, FLOATS, st.booleans(), ZONES, st.datetimes(), st.dates(), st.times(), LONG_TEXT
)
ANY = st.recursive(
    SCALARS,
    lambda inner: st.one_of(st.lists(inner, max_size=4), st.dictionaries(TEXT, inner, max_size=4)),
    max_leaves=8,
)


# Values that are plausible for many keys and sit on an edge: names of folders of the time-zone
# database, very long names, empty and blank text, NUL bytes, path tricks, huge integers.
TRICKY = st.sampled_from(
    [
        "America",
        "Europe",
        "x" * 300,
        "a/" * 150,
        "",
        " ",
        "\x00",
        "out/../../x.json",
        "/",
        ".",
        "..",
        "*",
        "nan",
        "1e400",
        2**63,
        -(2**63) - 1,
        10**30,
        0,
        -1,
        [],
        {},
        [[]],
        [{}],
    ]
)


def pick(*choices: Any) -> st.SearchStrategy[Any]:
    """Mostly one of the plausible choices, sometimes any TOML value."""
    return st.one_of(
        st.sampled_from(choices), st.sampled_from(choices), st.sampled_from(choices), ANY
    )


COLUMNS = pick("ts", "lat", "lon", "kind", "prov", "sev", "conf", "who", "nope", "", "Kind")
MEASURE_NAMES = (
    "reports",
    "observers",
    "total",
    "sev_mean",
    "hex",
    "kind",
    "__x",
    "reports_per_100000",
    "2x",
    "a b",
)
BINS = ("15m", "1h", "6h", "1d", "1w", "1mo", "3mo", "1y", "7m", "0h", "1fortnight", "")
TIME_ZONES = pick(
    "UTC",
    "Europe/Paris",
    "Etc/GMT+8",
    "America",
    "Europe/",
    "Mars/Base",
    "",
    "../etc/passwd",
    "posixrules",
)
AXES = pick("hex", "time", "region", "top", "digits", "kind", "prov")


def table(fields: dict[str, st.SearchStrategy[Any]]) -> st.SearchStrategy[dict[str, Any]]:
    """A table with a random subset of ``fields`` (order kept), each with a drawn value."""
    return st.fixed_dictionaries({}, optional=fields)


FILTER = table(
    {
        "column": COLUMNS,
        "in": st.lists(pick("rain", "hail", 1, 2.5, True, dt.date(2025, 3, 2)), max_size=3),
        "not_in": st.lists(pick("rain", 3, "x"), max_size=3),
        "min": pick(
            1,
            2.5,
            dt.datetime(2025, 3, 5),
            dt.date(2025, 3, 5),
            dt.datetime(2025, 3, 5, tzinfo=dt.UTC),
            "a",
            float("nan"),
        ),
        "max": pick(5, 0, dt.datetime(2025, 3, 1), "z", 2**70),
        "null": pick(True, False, "no"),
    }
)

SOURCE = table(
    {
        "path": pick(
            "events.parquet",
            "*.parquet",
            ".",
            "missing.parquet",
            "pop.csv",
            "",
            "events.parquet/x",
            "[",
            "**/*.parquet",
        ),
        "format": pick("parquet", "csv", "ndjson", "xlsx", ""),
        "time": COLUMNS,
        "lat": COLUMNS,
        "lon": COLUMNS,
        "time_zone": TIME_ZONES,
        "filter": st.one_of(st.lists(FILTER, max_size=3), FILTER, ANY),
    }
)

GROUP = table(
    {
        "hex": table(
            {
                "levels": st.one_of(st.lists(st.integers(-2, 17), max_size=4), ANY),
                "resolution": pick(0, 7, 15, 16, -1, "7"),
            }
        ),
        "time": table(
            {
                "levels": st.one_of(st.lists(st.sampled_from(BINS), max_size=4), ANY),
                "bin": pick(*BINS),
                "zone": TIME_ZONES,
            }
        ),
        "region": table({"column": COLUMNS}),
        "category": table(
            {"column": COLUMNS, "columns": st.one_of(st.lists(COLUMNS, max_size=3), ANY)}
        ),
    }
)

MEASURE = st.one_of(
    pick("count", "sum", "Count"),
    st.dictionaries(
        st.sampled_from(("sum", "mean", "min", "max", "distinct", "count", "avg")),
        COLUMNS,
        min_size=1,
        max_size=2,
    ),
)
MEASURES = st.dictionaries(
    pick(*MEASURE_NAMES).filter(lambda k: isinstance(k, str)), MEASURE, max_size=4
)

NORMALIZE = table(
    {
        "denominators": table(
            {
                "path": pick("pop.csv", "missing.csv", "events.parquet", ""),
                "key": pick("prov", "nope", "pop"),
                "value": pick("pop", "prov"),
                "on": pick("region", "hex", "x"),
            }
        ),
        "per": pick(100000, 1, 0, -5, 2**64),
        "measures": st.one_of(st.lists(pick(*MEASURE_NAMES), max_size=3), ANY),
        "share": table(
            {
                "measures": st.lists(pick(*MEASURE_NAMES), max_size=2),
                "within": st.lists(AXES, max_size=3),
            }
        ),
        "location_quotient": table({"measure": pick(*MEASURE_NAMES)}),
    }
)

PRUNE = table(
    {
        "top": table(
            {
                "k": st.one_of(st.lists(INTS, max_size=4), INTS, ANY),
                "by": pick(*MEASURE_NAMES),
                "within": st.lists(AXES, max_size=3),
                "rest": pick("other", "", "rain"),
            }
        ),
        "min_count": st.one_of(
            INTS,
            table({"min": INTS, "by": pick(*MEASURE_NAMES), "fold": pick(True, False, 1)}),
            ANY,
        ),
    }
)

BUDGET = table(
    {
        "max": pick(
            "300KB", "1.5MB", "200KiB", 250000, 0, -1, 1.5, "1e3KB", "KB", "300 kb", "9" * 30
        ),
        "on": pick("raw", "gzip", "brotli", "zip"),
        "order": st.one_of(st.lists(AXES, max_size=5), ANY),
    }
)

OUTPUT = table(
    {
        "path": pick(
            "out/x.json", "out/x", "x.csv", "/nonexistent/x.json", "..", "out/\u0000.json", ""
        ),
        "layout": pick("columns", "rows", "csv", "geojson"),
        "digits": st.one_of(INTS, st.lists(st.integers(-1, 17), max_size=4), ANY),
        "column_digits": st.dictionaries(
            pick(*MEASURE_NAMES).filter(lambda k: isinstance(k, str)), INTS, max_size=2
        ),
        "inline": pick(True, False, "yes"),
    }
)

DOCUMENT = table(
    {
        "name": pick("fuzz", "a", "x-1.y_2", "", "../up", "-dash"),
        "description": pick("about", ""),
        "source": SOURCE,
        "group": GROUP,
        "measures": MEASURES,
        "normalize": NORMALIZE,
        "prune": PRUNE,
        "budget": BUDGET,
        "output": OUTPUT,
        "sourc": ANY,
    }
)


@st.composite
def valid_documents(draw: st.DrawFn) -> dict[str, Any]:
    """A recipe that passes validation (before mutation): every section optional but
    consistent with the others and with the event table in the working folder."""
    doc: dict[str, Any] = {"name": draw(st.sampled_from(["fuzz", "a", "x-1.y_2", "Z9"]))}
    if draw(st.booleans()):
        doc["description"] = draw(TEXT.filter(lambda t: t.strip() != ""))
    source: dict[str, Any] = {"path": draw(st.sampled_from(["events.parquet", "*.parquet", "."]))}
    axes = draw(
        st.lists(
            st.sampled_from(["hex", "time", "region", "category"]),
            min_size=1,
            max_size=4,
            unique=True,
        )
    )
    group: dict[str, Any] = {}
    if "hex" in axes:
        source |= {"lat": "lat", "lon": "lon"}
        levels = sorted(draw(st.sets(st.integers(0, 15), min_size=1, max_size=4)), reverse=True)
        group["hex"] = (
            {"levels": levels}
            if len(levels) > 1 or draw(st.booleans())
            else {"resolution": levels[0]}
        )
    if "time" in axes:
        source["time"] = "ts"
        chain = draw(
            st.sampled_from(
                [
                    ["15m", "1h", "1d"],
                    ["1h", "6h", "1d", "1mo"],
                    ["1d", "1mo", "3mo", "1y"],
                    ["1d", "1w"],
                    ["1h"],
                ]
            )
        )
        group["time"] = {"levels": chain}
        if draw(st.booleans()):
            group["time"]["zone"] = draw(st.sampled_from(["UTC", "Europe/Paris", "Etc/GMT+8"]))
        if draw(st.booleans()):
            source["time_zone"] = draw(st.sampled_from(["UTC", "Asia/Tokyo"]))
    if "region" in axes:
        group["region"] = {"column": "prov"}
    if "category" in axes:
        group["category"] = draw(
            st.sampled_from([{"column": "kind"}, {"columns": ["kind", "sev"]}])
        )
    filters = draw(
        st.lists(
            st.sampled_from(
                [
                    {"column": "kind", "in": ["rain", "hail"]},
                    {"column": "kind", "not_in": ["fog"]},
                    {"column": "sev", "min": 2, "max": 4},
                    {"column": "conf", "min": 0.5},
                    {"column": "ts", "min": dt.datetime(2025, 3, 3, tzinfo=dt.UTC)},
                    {"column": "ts", "max": dt.datetime(2025, 3, 10)},
                    {"column": "who", "null": False},
                    {"column": "lat", "in": [1, 2.5]},
                ]
            ),
            max_size=2,
        )
    )
    if filters:
        source["filter"] = filters
    doc["source"] = source
    doc["group"] = group
    measures = draw(
        st.dictionaries(
            st.sampled_from(["reports", "observers", "total", "sev_mean", "lo", "hi"]),
            st.sampled_from(
                [
                    "count",
                    {"distinct": "who"},
                    {"sum": "conf"},
                    {"mean": "sev"},
                    {"min": "sev"},
                    {"max": "lat"},
                    {"sum": "lon"},
                ]
            ),
            min_size=1,
            max_size=4,
        )
    )
    doc["measures"] = measures
    additive = [m for m, k in measures.items() if k == "count" or "sum" in k]
    counting = [m for m, k in measures.items() if k == "count" or "distinct" in k]
    if "region" in axes and additive and draw(st.booleans()):
        doc["normalize"] = {
            "denominators": {"path": "pop.csv", "key": "prov", "value": "pop"},
            "per": draw(st.sampled_from([1000, 100000])),
            "measures": draw(st.lists(st.sampled_from(additive), min_size=1, unique=True)),
        }
        if draw(st.booleans()):
            doc["normalize"]["share"] = {"measures": additive[:1]}
    prune: dict[str, Any] = {}
    if "category" in axes and draw(st.booleans()):
        ks = sorted(draw(st.sets(st.integers(1, 8), min_size=1, max_size=3)), reverse=True)
        prune["top"] = {"k": ks, "by": draw(st.sampled_from(sorted(measures)))}
    if counting and draw(st.booleans()):
        prune["min_count"] = draw(
            st.one_of(
                st.integers(1, 5),
                st.builds(
                    lambda n, b: {"min": n, "by": b}, st.integers(1, 5), st.sampled_from(counting)
                ),
            )
        )
    if prune:
        doc["prune"] = prune
    if draw(st.booleans()):
        doc["budget"] = {
            "max": draw(st.sampled_from(["300KB", "1.5MB", "200KiB", 250000])),
            "on": draw(st.sampled_from(["raw", "gzip", "brotli"])),
        }
    output: dict[str, Any] = {"path": "out/x.json"}
    if draw(st.booleans()):
        output["digits"] = sorted(
            draw(st.sets(st.integers(0, 15), min_size=1, max_size=3)), reverse=True
        )
    if draw(st.booleans()):
        output["inline"] = draw(st.booleans())
    doc["output"] = output
    return doc


def _paths(node: Any, at: tuple[Any, ...] = ()) -> Iterator[tuple[Any, ...]]:
    if isinstance(node, dict):
        for k, v in node.items():
            yield (*at, k)
            yield from _paths(v, (*at, k))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            yield (*at, i)
            yield from _paths(v, (*at, i))


def _typo(word: str, i: int, how: int) -> str:
    if not word:
        return "x"
    i %= len(word)
    if how == 0:
        return word[:i] + word[i + 1 :]  # drop a letter
    if how == 1:
        return word[:i] + word[i] + word[i:]  # double a letter
    if how == 2 and len(word) > 1:
        j = min(i + 1, len(word) - 1)
        w = list(word)
        w[i], w[j] = w[j], w[i]  # swap two letters
        return "".join(w)
    return word.upper()


@st.composite
def documents(draw: st.DrawFn) -> dict[str, Any]:
    """Mostly a valid recipe, sometimes a wild one; then up to three mutations."""
    # A copy: sampled_from hands out the same list and table objects every time, and the
    # mutations below must not change them.
    doc = copy.deepcopy(
        draw(st.one_of(valid_documents(), valid_documents(), valid_documents(), DOCUMENT))
    )
    for _ in range(draw(st.integers(0, 3))):
        paths = list(_paths(doc))
        if not paths:
            break
        path = draw(st.sampled_from(paths))
        parent: Any = doc
        for p in path[:-1]:
            parent = parent[p]
        last = path[-1]
        kind = draw(st.sampled_from(["drop", "typo", "type", "range", "tricky"]))
        if kind == "drop":
            del parent[last]
        elif kind == "typo" and isinstance(last, str):
            value = parent.pop(last)
            parent[_typo(last, draw(st.integers(0, 30)), draw(st.integers(0, 3)))] = value
        elif kind == "range":
            parent[last] = draw(
                st.sampled_from(
                    [
                        -1,
                        0,
                        16,
                        2**63 - 1,
                        2**63,
                        -(2**64),
                        10**30,
                        float("nan"),
                        float("inf"),
                        -0.0,
                        1e308,
                    ]
                )
            )
        elif kind == "tricky":
            parent[last] = copy.deepcopy(draw(TRICKY))
        else:
            parent[last] = draw(ANY)
    return doc


OVERRIDES = st.one_of(
    st.none(),
    st.builds(
        lambda k, v: f"{k}={v}",
        pick(
            "budget.max",
            "prune.top.k",
            "group.hex.levels",
            "output.digits",
            "name",
            "source",
            "source.path.x",
            "a..b",
            "",
            "measures.x",
        ),
        pick(
            "200KB", "[5, 7]", "[1,", "3", '"x"', "{ a = 1 }", "", "nan", "99999999999999999999999"
        ),
    ),
    TEXT,
)

# --------------------------------------------------------------------------------------------
# The fuzz
# --------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    d = tmp_path_factory.mktemp("fuzz")
    events(n=200).write_parquet(d / "events.parquet")
    (d / "pop.csv").write_text("prov,pop\nAAA,120000\nBBB,45000\nCCC,300000\nDDD,80000\n")
    return d


def crash_of(folder: Path, text: str, override: str | None) -> list[tuple[str, ...]]:
    """The crashes one document causes: ``[]``, or a short signature per crash."""
    found: list[tuple[str, ...]] = []
    (folder / "recipe.toml").write_text(text, encoding="utf-8")
    try:
        reduce.load_recipe(folder / "recipe.toml")
    except ReduceError as e:
        if "\n" in e.message:
            found.append(("load_recipe", "message of several lines"))
    except Exception as e:  # noqa: BLE001 - any other exception is what we look for
        where = traceback.extract_tb(e.__traceback__)[-1]
        found.append(
            ("load_recipe", type(e).__name__, f"{Path(where.filename).name}:{where.lineno}")
        )
    args = ["check", "recipe.toml"] + (["--set", override] if override is not None else [])
    res = CliRunner().invoke(main, args)
    err = res.stderr
    if res.exception is not None and not isinstance(res.exception, SystemExit):
        found.append(("check", "uncaught", type(res.exception).__name__))
    elif res.exit_code not in (0, 2) or "Traceback" in res.stdout + err:
        internal = re.search(r"internal error \((\w+: [^(;]{0,40})", err)
        found.append(
            (
                "check",
                f"exit {res.exit_code}",
                internal.group(1).strip() if internal else err.strip()[:40],
            )
        )
    elif (
        res.exit_code == 2
        and not err.startswith("Usage:")
        and (len(err.strip("\n").splitlines()) != 1 or not err.startswith("error: "))
    ):
        # str.splitlines() breaks at \r, \v, \f, \x1c-\x1e, \x85, U+2028 and U+2029 too.
        found.append(("check", "not one error line"))
    return found


def test_no_recipe_document_crashes_load_recipe_or_check(
    folder: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("REDUCE_CACHE_DIR", str(folder / "cache"))
    monkeypatch.chdir(folder)
    cases = 0

    @settings(
        max_examples=EXAMPLES,
        derandomize=True,
        database=None,
        deadline=None,
        suppress_health_check=list(HealthCheck),
    )
    @given(doc=documents(), override=OVERRIDES)
    def one(doc: dict[str, Any], override: str | None) -> None:
        nonlocal cases
        cases += 1
        # A crash fails the example; hypothesis then shrinks the document itself (and
        # reports each distinct crash separately).
        found = crash_of(folder, to_toml(doc), override)
        assert not found, f"{' | '.join(found[0])}:\n{to_toml(doc)}" + (
            f"with --set {override!r}" if override else ""
        )

    one()
    assert cases >= EXAMPLES
