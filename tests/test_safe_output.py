"""Safe output: payloads stay valid JSON whatever the data says, and nothing is let in.

- Whatever the category strings hold (quotes, backslashes, every control character
  U+0000-U+001F, emoji, right-to-left marks, U+2028/U+2029), a payload is valid JSON per
  RFC 8259 (checked with Python's ``json`` module, strict about control characters, with
  NaN and Infinity refused) and decodes back to exactly the original strings.
- Invalid UTF-8 in a CSV source becomes U+FFFD (the documented policy: CSV is read as
  "utf8-lossy"), not a crash.
- ``[output] inline = true`` escapes ``<``, ``>``, ``&``, U+2028 and U+2029 (RFC 8259 §7
  allows any character as ``\\uXXXX``), so a category value such as
  ``</script><script>alert(1)</script>`` cannot close the ``<script>`` element a page pastes
  the payload into.
- No recipe value is ever evaluated: code in a filter value, a label, a path or a ``--set``
  value stays a literal string (README: "Nothing in a recipe is ever evaluated as code").
- Nothing is written outside the output folder: not beside the recipe, not through a link
  planted at the manifest path.
"""

from __future__ import annotations

import json
import os
import textwrap
from pathlib import Path
from typing import Any

import polars as pl
import pytest

from tests._builders import events, invoke

PAYLOAD_RECIPE = """
name = "safe"

[source]
path = "events.parquet"
time = "ts"

[group]
time = { levels = ["1w"] }
region = { column = "prov" }
category = { column = "kind" }

[measures]
reports = "count"
level = { mean = "x" }

[output]
path = "out/safe.json"
layout = "columns"
"""

# Category values that have broken hand-written JSON encoders and HTML embeddings.
CONTROL = [chr(c) for c in range(0x20)]
AWKWARD = [
    '"',
    "\\",
    '\\"',
    '"\\',
    'a"b\\c',
    "'",
    "`",
    "".join(CONTROL),
    "tab\there",
    "line\nbreak",
    "cr\rlf\n",
    "nul\x00byte",
    "\u2028",
    "\u2029",
    "ls\u2028ps\u2029",
    "\u200f",
    "\u202erevo\u202c",
    "\u200e\u061c",
    "😀",
    "👩\u200d👩\u200d👧",
    "🏳️\u200d🌈",
    "\ufeffbom",
    "\ufffd",
    "\x7f",
    "\u0085",
    "</script><script>alert(1)</script>",
    "<!--",
    "]]>",
    "&amp;",
    "${x}",
    "%s%n",
    "",
    " ",
    "null",
    "NaN",
    "Infinity",
    "-0",
    "1e400",
    "\U0010ffff",
]


@pytest.fixture(autouse=True)
def _isolated(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)


def _refuse_constant(name: str) -> Any:
    raise ValueError(f"{name} is not JSON (RFC 8259 has no NaN or Infinity)")


def strict_json(data: bytes) -> Any:
    """Parse as RFC 8259 JSON: UTF-8, no raw control characters in strings, no NaN or
    Infinity, every integer within ±2^53 (DESIGN: a browser's numbers hold it exactly)."""
    doc = json.loads(data.decode("utf-8"), parse_constant=_refuse_constant, strict=True)

    def walk(v: Any) -> None:
        if isinstance(v, bool):
            return
        if isinstance(v, int):
            assert abs(v) <= 2**53 - 1, v
        elif isinstance(v, list):
            for x in v:
                walk(x)
        elif isinstance(v, dict):
            for x in v.values():
                walk(x)

    walk(doc)
    return doc


def column(payload: dict[str, Any], name: str) -> list[Any]:
    values = payload["columns"][name]
    labels = payload.get("dictionaries", {}).get(name)
    return [labels[i] for i in values] if labels is not None else values


def write_awkward_events(tmp: Path, kinds: list[str]) -> pl.DataFrame:
    n = 4 * len(kinds)
    df = events(n=n).with_columns(
        kind=pl.Series([kinds[i % len(kinds)] for i in range(n)]),
        prov=pl.Series([kinds[(i * 7) % len(kinds)] for i in range(n)]),
        x=pl.Series(
            [
                [float("nan"), float("inf"), -float("inf"), 1.5][i % 4] if i < 40 else float(i)
                for i in range(n)
            ]
        ),
    )
    df.write_parquet(tmp / "events.parquet")
    return df


@pytest.mark.parametrize("layout", ["columns", "rows"])
@pytest.mark.parametrize("inline", [False, True])
def test_payload_is_valid_json_whatever_the_category_strings(
    tmp_path: Path, layout: str, inline: bool
) -> None:
    write_awkward_events(tmp_path, AWKWARD)
    text = PAYLOAD_RECIPE.replace(
        'layout = "columns"', f'layout = "{layout}"\ninline = {str(inline).lower()}'
    )
    (tmp_path / "recipe.toml").write_text(textwrap.dedent(text))
    code, _, err = invoke("run", "recipe.toml", "--quiet")
    assert code == 0, err
    data = (tmp_path / "out" / "safe.json").read_bytes()
    doc = strict_json(data)
    if layout == "columns":
        kinds, provs, levels = column(doc, "kind"), column(doc, "prov"), column(doc, "level")
    else:
        kinds = [r["kind"] for r in doc]
        provs = [r["prov"] for r in doc]
        levels = [r["level"] for r in doc]
    assert set(kinds) == set(AWKWARD)  # every string decodes back exactly
    assert set(provs) == set(AWKWARD)
    assert None in levels  # the NaN and infinite means became null, not NaN or Infinity
    strict_json((tmp_path / "out" / "safe.json.manifest.json").read_bytes())


def test_invalid_utf8_in_a_csv_source_becomes_replacement_characters(tmp_path: Path) -> None:
    rows = [b"ts,prov,kind,x"]
    for i in range(60):
        kind = [b"rain", b"ha\xffil", b"\xc3(fog", b"dust\xe2\x82"][i % 4]
        rows.append(b"2025-03-0%dT10:00:00Z,AAA,%s,%d" % (1 + i % 5, kind, i))
    (tmp_path / "events.csv").write_bytes(b"\n".join(rows) + b"\n")
    (tmp_path / "recipe.toml").write_text(
        textwrap.dedent(PAYLOAD_RECIPE.replace("events.parquet", "events.csv"))
    )
    code, _, err = invoke("check", "recipe.toml")
    assert code == 0, err
    code, _, err = invoke("run", "recipe.toml", "--quiet")
    assert code == 0, err
    doc = strict_json((tmp_path / "out" / "safe.json").read_bytes())
    # One U+FFFD per invalid sequence, the valid text around it kept (WHATWG/Unicode
    # "maximal subpart" replacement, which Rust's from_utf8_lossy follows).
    assert set(column(doc, "kind")) == {"rain", "ha\ufffdil", "\ufffd(fog", "dust\ufffd"}
    assert doc["accounting"]["input_rows"] == doc["accounting"]["represented_rows"] == 60


INLINE_HOSTILE = [
    "</script><script>alert(1)</script>",
    "</SCRIPT >",
    "<!--<script>",
    "a & b",
    "&lt;",
    "x\u2028y",
    "x\u2029y",
    "]]>",
    "<\u2028>&",
]


@pytest.mark.parametrize("layout", ["columns", "rows"])
def test_inline_payload_cannot_close_a_script_element(tmp_path: Path, layout: str) -> None:
    write_awkward_events(tmp_path, INLINE_HOSTILE)
    text = PAYLOAD_RECIPE.replace('layout = "columns"', f'layout = "{layout}"\ninline = true')
    text = text.replace(
        "[output]", '[prune]\ntop = { k = 20, rest = "</script>&rest" }\n\n[output]'
    )
    (tmp_path / "recipe.toml").write_text(textwrap.dedent(text))
    code, _, err = invoke("run", "recipe.toml", "--quiet")
    assert code == 0, err
    data = (tmp_path / "out" / "safe.json").read_bytes()
    for raw in (b"<", b">", b"&", "\u2028".encode(), "\u2029".encode()):
        assert raw not in data, raw
    doc = strict_json(data)
    kinds = column(doc, "kind") if layout == "columns" else [r["kind"] for r in doc]
    assert set(kinds) == set(INLINE_HOSTILE)
    if layout == "columns":
        assert doc["meta"]["rest"] == "</script>&rest"
    # The same bytes inside a page: the only "</script" is the page's own closing tag.
    page = b"<script>const data = " + data + b";</script>"
    assert page.lower().count(b"</script") == 1


def test_payload_without_inline_still_round_trips_hostile_strings(tmp_path: Path) -> None:
    write_awkward_events(tmp_path, INLINE_HOSTILE)
    (tmp_path / "recipe.toml").write_text(textwrap.dedent(PAYLOAD_RECIPE))
    code, _, err = invoke("run", "recipe.toml", "--quiet")
    assert code == 0, err
    doc = strict_json((tmp_path / "out" / "safe.json").read_bytes())
    assert set(column(doc, "kind")) == set(INLINE_HOSTILE)


CODE = "__import__('os').system('touch PWNED')"
SHELL = "$(touch PWNED)`touch PWNED`;touch PWNED"


def no_pwned_file(*roots: Path) -> None:
    for root in roots:
        assert not list(root.rglob("PWNED")), f"a recipe value was executed under {root}"
    assert not Path("PWNED").exists()


def test_code_in_a_filter_value_is_compared_as_a_literal(tmp_path: Path) -> None:
    df = events(n=300)
    df = df.with_columns(
        pl.when(pl.int_range(pl.len()) < 7)
        .then(pl.lit(CODE))
        .otherwise(pl.col("kind"))
        .alias("kind")
    )
    df.write_parquet(tmp_path / "events.parquet")
    text = PAYLOAD_RECIPE.replace(
        'time = "ts"\n',
        f'time = "ts"\nfilter = [{{ column = "kind", in = ["rain", {json.dumps(CODE)}] }}]\n',
    )
    text = text.replace('level = { mean = "x" }', "")
    (tmp_path / "recipe.toml").write_text(textwrap.dedent(text))
    code, _, err = invoke("run", "recipe.toml", "--quiet")
    assert code == 0, err
    doc = strict_json((tmp_path / "out" / "safe.json").read_bytes())
    kept = int(df["kind"].is_in(["rain", CODE]).sum())
    assert doc["accounting"]["filtered_rows"] == 300 - kept
    assert set(column(doc, "kind")) == {"rain", CODE}
    no_pwned_file(tmp_path)


@pytest.mark.parametrize(
    "where",
    [
        "rest label",
        "measure column",
        "source path",
        "set override",
        "output file name",
        "time zone",
    ],
)
def test_code_anywhere_in_a_recipe_is_never_run(tmp_path: Path, where: str) -> None:
    events(n=300).write_parquet(tmp_path / "events.parquet")
    text = textwrap.dedent(PAYLOAD_RECIPE)
    if where != "measure column":
        text = text.replace('level = { mean = "x" }', "")
    args: list[str] = []
    if where == "rest label":
        text = text.replace(
            "[output]", f"[prune]\ntop = {{ k = 2, rest = {json.dumps(CODE)} }}\n\n[output]"
        )
    elif where == "measure column":
        text = text.replace('mean = "x"', f"mean = {json.dumps(CODE)}")
    elif where == "source path":
        text = text.replace('path = "events.parquet"', f"path = {json.dumps(SHELL)}")
    elif where == "set override":
        args = ["--set", f"output.path={CODE}", "--set", f"prune.top.rest={SHELL}"]
    elif where == "output file name":
        name = json.dumps(f"out/{SHELL}.json")
        text = text.replace('path = "out/safe.json"', f"path = {name}")
    else:
        text = text.replace('levels = ["1w"]', f'levels = ["1w"], zone = {json.dumps(CODE)}')
    (tmp_path / "recipe.toml").write_text(text)
    code, _, err = invoke("run", "recipe.toml", "--quiet", *args)
    assert code in (0, 2), err
    assert "Traceback" not in err
    no_pwned_file(tmp_path)
    if where == "output file name":
        assert code == 0, err
        assert (tmp_path / "out" / f"{SHELL}.json").is_file()  # the name, literally
    if where == "rest label":
        assert code == 0, err
        doc = strict_json((tmp_path / "out" / "safe.json").read_bytes())
        assert CODE in column(doc, "kind")  # the label, literally


def tree(root: Path, skip: tuple[str, ...] = ()) -> dict[str, bytes | str]:
    out: dict[str, bytes | str] = {}
    for dirpath, dirnames, filenames in os.walk(root):
        rel = Path(dirpath).relative_to(root)
        if rel.parts[:1] and rel.parts[0] in skip:
            continue
        for d in dirnames:
            out[str(rel / d)] = "dir"
        for f in filenames:
            p = Path(dirpath) / f
            out[str(rel / f)] = ("link:" + os.readlink(p)) if p.is_symlink() else p.read_bytes()
    return out


def test_run_writes_only_inside_the_output_folder(tmp_path: Path) -> None:
    work = tmp_path / "work"
    work.mkdir()
    write_awkward_events(work, ["a", "b", "c"])
    text = PAYLOAD_RECIPE.replace('path = "out/safe.json"', 'path = "../elsewhere/safe.json"')
    (work / "recipe.toml").write_text(textwrap.dedent(text))
    (tmp_path / "dest").mkdir()
    before = tree(tmp_path, skip=("dest",))
    code, _, err = invoke("run", "work/recipe.toml", "--out", "dest", "--quiet", "--no-cache")
    assert code == 0, err
    assert tree(tmp_path, skip=("dest",)) == before  # nothing beside the recipe, no cache
    # The payload, its manifest and the folder's lock file (reduce.publish.LOCK_NAME).
    assert sorted(p.name for p in (tmp_path / "dest").iterdir()) == [
        ".reduce.lock",
        "safe.json",
        "safe.json.manifest.json",
    ]


def test_link_planted_at_the_manifest_path_is_not_followed(tmp_path: Path) -> None:
    write_awkward_events(tmp_path, ["a", "b", "c"])
    (tmp_path / "recipe.toml").write_text(textwrap.dedent(PAYLOAD_RECIPE))
    code, _, err = invoke("run", "recipe.toml", "--quiet")
    assert code == 0, err
    outside = tmp_path / "outside"
    outside.mkdir()
    victim = outside / "victim.txt"
    victim.write_text("keep me\n")
    manifest = tmp_path / "out" / "safe.json.manifest.json"
    manifest.unlink()
    manifest.symlink_to(victim)
    invoke("run", "recipe.toml", "--quiet", "--set", 'budget.max="5MB"')
    assert victim.read_text() == "keep me\n"
    assert sorted(p.name for p in outside.iterdir()) == ["victim.txt"]
