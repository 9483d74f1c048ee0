"""Pre-compressed siblings (``[output] precompress = true``) and previews written by ``run``.

External references: Python's ``gzip`` module (RFC 1952) and the ``brotli`` module
(RFC 7932) decompress the siblings; the lengths are compared with the manifest.
"""

from __future__ import annotations

import gzip
import json
from pathlib import Path

import brotli
import pytest
from click.testing import CliRunner

import reduce
from reduce.audit import audit_paths
from reduce.cli import main
from reduce.publish import manifest_path

EVENTS = {"region": ["a", "b", "a", "c", "b", "a"], "kind": ["x", "y", "x", "x", "y", "y"]}


def _case(case, **output):  # type: ignore[no-untyped-def]
    return case(
        EVENTS,
        group={"region": {"column": "region"}, "category": {"column": "kind"}},
        output={"path": "out/case.json", **output},
    )


def test_precompress_writes_gz_and_br_that_decompress_to_the_payload(case) -> None:  # type: ignore[no-untyped-def]
    recipe = _case(case, precompress=True)
    res = reduce.run(recipe, use_cache=False)
    data = res.path.read_bytes()
    gz = res.path.with_name("case.json.gz").read_bytes()
    br = res.path.with_name("case.json.br").read_bytes()
    assert gzip.decompress(gz) == data  # Python's gzip module, RFC 1952
    assert brotli.decompress(br) == data  # the brotli module, RFC 7932
    man = json.loads(manifest_path(res.path).read_bytes())
    assert man["bytes"]["gzip"] == len(gz) and man["bytes"]["brotli"] == len(br)
    assert man["precompressed"] == {"gzip": "case.json.gz", "brotli": "case.json.br"}
    # Same as the sizes module measures: gzip level 9 with a zero timestamp.
    assert gz == gzip.compress(data, compresslevel=9, mtime=0)
    assert not list(res.path.parent.glob(".*.tmp"))


def test_precompress_is_also_set_from_the_command_line(case) -> None:  # type: ignore[no-untyped-def]
    recipe = _case(case)
    res = CliRunner().invoke(
        main, ["run", str(recipe), "--no-cache", "-q", "--set", "output.precompress=true"]
    )
    assert res.exit_code == 0, res.output
    out = recipe.parent / "out"
    assert gzip.decompress((out / "case.json.gz").read_bytes()) == (out / "case.json").read_bytes()


def test_siblings_of_an_earlier_run_are_removed_when_precompress_is_off(case) -> None:  # type: ignore[no-untyped-def]
    recipe = _case(case, precompress=True)
    reduce.run(recipe, use_cache=False)
    out = recipe.parent / "out"
    assert (out / "case.json.gz").exists()
    res = reduce.run(recipe, use_cache=False, overrides={"output.precompress": "false"})
    assert not (out / "case.json.gz").exists() and not (out / "case.json.br").exists()
    assert "precompressed" not in json.loads((out / "case.json.manifest.json").read_bytes())
    assert res.path.exists()


def test_audit_finds_no_problem_with_fresh_siblings_and_skips_them_as_files(case) -> None:  # type: ignore[no-untyped-def]
    recipe = _case(case, precompress=True)
    reduce.run(recipe, use_cache=False)
    report = audit_paths([recipe.parent / "out"])
    assert [Path(f.path).name for f in report.files] == ["case.json"]
    assert report.files[0].problems == ()


@pytest.mark.parametrize(
    "suffix, damage, message",
    [
        (".gz", lambda b: gzip.compress(b + b" ", mtime=0), "does not decompress to the payload"),
        (".br", lambda b: b"not brotli", "not valid brotli"),
        # Two gzip members (RFC 1952 2.2) decompress to the same bytes but are longer.
        (
            ".gz",
            lambda b: gzip.compress(b[:10], mtime=0) + gzip.compress(b[10:], mtime=0),
            "but the manifest's bytes.gzip",
        ),
    ],
)
def test_audit_reports_a_sibling_that_disagrees_with_the_payload(
    case,
    suffix: str,
    damage,  # type: ignore[no-untyped-def]
    message: str,
) -> None:
    recipe = _case(case, precompress=True)
    res = reduce.run(recipe, use_cache=False)
    sib = res.path.with_name(res.path.name + suffix)
    sib.write_bytes(damage(res.path.read_bytes()))
    report = audit_paths([res.path])
    problems = report.files[0].problems
    assert any(p.startswith(sib.name) and message in p for p in problems), problems


def test_audit_reports_a_listed_sibling_that_is_missing(case) -> None:  # type: ignore[no-untyped-def]
    recipe = _case(case, precompress=True)
    res = reduce.run(recipe, use_cache=False)
    res.path.with_name("case.json.br").unlink()
    problems = audit_paths([res.path]).files[0].problems
    assert any("case.json.br: listed in the manifest but missing" in p for p in problems)


def test_output_preview_writes_picture_and_page_on_run(case) -> None:  # type: ignore[no-untyped-def]
    recipe = _case(case, preview=True)
    res = reduce.run(recipe, use_cache=False)
    assert res.path.with_name("case.png").read_bytes().startswith(b"\x89PNG\r\n\x1a\n")
    page = res.path.with_name("case.html").read_bytes()
    assert page.startswith(b"<!doctype html>") and res.path.read_bytes()[:40] in page


@pytest.mark.parametrize("key, value", [("precompress", "yes"), ("preview", 1)])
def test_output_flags_must_be_booleans(case, key: str, value) -> None:  # type: ignore[no-untyped-def]
    recipe = _case(case, **{key: value})
    with pytest.raises(reduce.errors.RecipeError, match=f"output.{key}: must be true or false"):
        reduce.load_recipe(recipe)


def test_audit_of_a_folder_leaves_out_the_previews_of_its_payloads(case) -> None:  # type: ignore[no-untyped-def]
    recipe = _case(case, preview=True, precompress=True)
    reduce.run(recipe, use_cache=False)
    out = recipe.parent / "out"
    assert {p.name for p in out.iterdir()} >= {"case.png", "case.html", "case.json.gz"}
    (out / "other.png").write_bytes(b"\x89PNG\r\n\x1a\n")  # not a preview: still audited
    report = audit_paths([out])
    assert sorted(Path(f.path).name for f in report.files) == ["case.json", "other.png"]


def test_preview_of_a_folder_takes_the_payloads_with_a_manifest(case) -> None:  # type: ignore[no-untyped-def]
    recipe = _case(case)
    reduce.run(recipe, use_cache=False)
    out = recipe.parent / "out"
    (out / "budgets.json").write_text("{}")  # not a payload: left alone
    res = CliRunner().invoke(main, ["preview", str(out)])
    assert res.exit_code == 0, res.output
    assert len(res.output.strip().splitlines()) == 1 and (out / "case.png").is_file()
    assert not (out / "budgets.png").exists()


def test_output_preview_of_a_csv_layout_is_refused(case) -> None:  # type: ignore[no-untyped-def]
    recipe = _case(case, preview=True, layout="csv", path="out/case.csv")
    with pytest.raises(
        reduce.errors.RecipeError,
        match=r"output.preview: draws JSON layouts "
        r"\(columns, rows, geojson\) only",
    ):
        reduce.load_recipe(recipe)
