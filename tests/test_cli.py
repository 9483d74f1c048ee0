"""Command line: exit codes and exact one-line messages (click's CliRunner, in-process)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from reduce.cli import main
from tests._builders import (
    HEX_RECIPE,
    REGION_RECIPE,
    events,
    invoke,
    lower_sample_thresholds,
    project,
    write_recipe,
)


@pytest.fixture(autouse=True)
def _isolated(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)


def one_error_line(stderr: str) -> str:
    lines = stderr.strip().splitlines()
    assert len(lines) == 1, stderr
    assert "Traceback" not in stderr
    return lines[0]


def test_run_writes_payload_and_manifest_and_prints_summary(tmp_path: Path) -> None:
    recipe = project(tmp_path)
    code, out, err = invoke("run", str(recipe), "--quiet")
    assert code == 0, err
    assert out == ""
    code, out, err = invoke("run", str(recipe))
    assert code == 0, err
    assert out.startswith("hexmap: ")
    assert "-> out/hexmap.json" in out
    payload = json.loads((tmp_path / "out" / "hexmap.json").read_bytes())
    manifest = json.loads((tmp_path / "out" / "hexmap.json.manifest.json").read_bytes())
    assert payload["format"] == "reduce.columns/1"
    assert manifest["payload"] == "hexmap.json"
    assert manifest["level"] == payload["level"]


def test_unknown_recipe_key_names_file_key_and_hint(tmp_path: Path) -> None:
    recipe = project(tmp_path, HEX_RECIPE.replace("[budget]", "[budget]\nmaxx = 3"))
    code, _, err = invoke("run", str(recipe))
    assert code == 2
    assert one_error_line(err) == (
        "error: recipe.toml: budget.maxx: unknown key (did you mean 'max'?); allowed here: "
        "max, on, order"
    )


def test_missing_column_names_column_key_and_close_match(tmp_path: Path) -> None:
    recipe = project(tmp_path, HEX_RECIPE.replace('distinct = "who"', 'distinct = "whom"'))
    code, _, err = invoke("check", str(recipe))
    assert code == 2
    assert one_error_line(err) == (
        "error: events.parquet: column 'whom' (from recipe.toml: measures.observers) is not in "
        "the source (did you mean 'who'?); columns are: ts, lat, lon, kind, prov, sev, conf, "
        "who"
    )


def test_column_of_wrong_type_is_named(tmp_path: Path) -> None:
    recipe = project(tmp_path, HEX_RECIPE.replace('mean = "sev"', 'mean = "kind"'))
    code, _, err = invoke("run", str(recipe))
    assert code == 2
    assert one_error_line(err) == (
        "error: events.parquet: column 'kind' (from recipe.toml: measures.severity) is String, "
        "but measures.severity needs numbers; convert the column or pick another"
    )


def test_coordinates_stored_as_text_are_a_type_error(tmp_path: Path) -> None:
    df = events().with_columns(events()["lat"].cast(str))
    recipe = project(tmp_path, df=df)
    code, _, err = invoke("check", str(recipe))
    assert code == 2
    assert one_error_line(err) == (
        "error: events.parquet: column 'lat' (from recipe.toml: source.lat) is String, but "
        "source.lat needs numbers (decimal degrees); convert the column or pick another"
    )


def test_a_missing_source_file_is_one_error_line_exit_2(tmp_path: Path) -> None:
    recipe = write_recipe(tmp_path, HEX_RECIPE)
    code, _, err = invoke("run", str(recipe))
    assert code == 2
    assert one_error_line(err) == (
        "error: source.path 'events.parquet': no such file or folder (events.parquet); check "
        "the path, which is relative to the recipe file"
    )


def test_unknown_time_zone_with_hint(tmp_path: Path) -> None:
    recipe = project(tmp_path, HEX_RECIPE.replace('zone = "UTC"', 'zone = "Europe/Pari"'))
    code, _, err = invoke("check", str(recipe))
    assert code == 2
    assert one_error_line(err) == (
        "error: recipe.toml: group.time.zone: unknown time zone 'Europe/Pari' (did you mean "
        "'Europe/Paris'?); use an IANA name such as UTC or Europe/Paris"
    )


def test_a_missing_denominators_file_is_one_error_line_exit_2(tmp_path: Path) -> None:
    recipe = project(tmp_path, REGION_RECIPE.replace("pop.csv", "people.csv"))
    code, _, err = invoke("run", str(recipe))
    assert code == 2
    assert one_error_line(err) == (
        "error: people.csv (normalize.denominators): file not found; check "
        "normalize.denominators.path, which is relative to the recipe file"
    )


def test_out_of_range_coordinates_are_counted_not_an_error(tmp_path: Path) -> None:
    df = events(n=1000).with_columns(
        lat=__import__("polars")
        .when(__import__("polars").int_range(1000) < 7)
        .then(95.0)
        .otherwise(__import__("polars").col("lat"))
    )
    recipe = project(tmp_path, HEX_RECIPE.replace('max = "40KB"', 'max = "5MB"'), df=df)
    code, _, err = invoke("run", str(recipe), "--quiet")
    assert code == 0, err
    acc = json.loads((tmp_path / "out" / "hexmap.json").read_bytes())["accounting"]
    assert acc["invalid_rows"] == 7
    assert acc["input_rows"] == 1000


def test_toml_syntax_error_reports_line(tmp_path: Path) -> None:
    recipe = project(tmp_path, HEX_RECIPE.replace('name = "hexmap"', 'name = "hexmap'))
    code, _, err = invoke("check", str(recipe))
    assert code == 2
    line = one_error_line(err)
    assert line.startswith("error: recipe.toml: TOML syntax error: ")
    assert "(at line 1, column 15)" in line


def test_nothing_fits_exits_1_names_smallest_and_writes_nothing(tmp_path: Path) -> None:
    recipe = project(tmp_path)
    code, out, err = invoke("run", str(recipe), "--budget", "300B")
    assert code == 1
    line = one_error_line(err)
    assert line.startswith(
        "error: recipe.toml: no level fits the budget of 300 B gzip: the smallest payload is "
    )
    assert (
        "at hex=5, time=1w, top=1, digits=4; raise budget.max (or --budget), add a coarser "
        "hex level, add a wider time bin, lower prune.top.k" in line
    )
    assert not (tmp_path / "out").exists()  # not even an empty output folder


def test_write_anyway_writes_smallest_and_still_exits_1(tmp_path: Path) -> None:
    recipe = project(tmp_path)
    code, _, err = invoke("run", str(recipe), "--budget", "300B", "--write-anyway", "--json")
    assert code == 1
    payload = json.loads((tmp_path / "out" / "hexmap.json").read_bytes())
    assert payload["level"] == {"hex": 5, "time": "1w", "top": 1, "digits": 4}


_NOT_A_SIZE = "is not a size; use e.g. 300KB, 1.5MB, 200KiB or 250000"


@pytest.mark.parametrize(
    ("args", "line"),
    [
        (["run", "R", "--budget", "lots"], f"error: --budget: 'lots' {_NOT_A_SIZE}"),
        (["run", "R", "--budget", "3XB"], f"error: --budget: '3XB' {_NOT_A_SIZE}"),
        (
            ["run", "R", "--budget", "0"],
            "error: --budget: '0' is not a positive size; a budget must be above zero bytes",
        ),
        (["ladder", "R", "--budget", "3XB"], f"error: --budget: '3XB' {_NOT_A_SIZE}"),
        (["audit", "P", "--budget", "3XB"], f"error: --budget: '3XB' {_NOT_A_SIZE}"),
        (["audit", "P", "--total", "abc"], f"error: --total: 'abc' {_NOT_A_SIZE}"),
        (
            ["audit", "P", "--total", "-5KB"],
            f"error: --total: '-5KB' {_NOT_A_SIZE}",
        ),
        (
            ["run", "R", "--on", "gzp"],
            "error: --on: 'gzp' is not a measure (did you mean 'gzip'?); use raw, gzip or brotli",
        ),
        (
            ["ladder", "R", "--on", "foo"],
            "error: --on: 'foo' is not a measure; use raw, gzip or brotli",
        ),
        (
            ["audit", "P", "--on", "brotly"],
            "error: --on: 'brotly' is not a measure (did you mean 'brotli'?); use raw, gzip or "
            "brotli",
        ),
    ],
)
def test_bad_size_or_measure_option_is_one_error_line_exit_2(
    tmp_path: Path, args: list[str], line: str
) -> None:
    recipe = project(tmp_path)
    (tmp_path / "payload.json").write_bytes(b"{}")
    given = [{"R": str(recipe), "P": str(tmp_path / "payload.json")}.get(a, a) for a in args]
    code, out, err = invoke(*given)
    assert code == 2
    assert out == ""
    assert one_error_line(err) == line
    assert not (tmp_path / "out").exists()  # nothing ran


def test_size_and_measure_options_accept_every_documented_form(tmp_path: Path) -> None:
    recipe = project(tmp_path)
    for budget in ("300KB", "1.5MB", "200KiB", "250000"):
        code, _, err = invoke("ladder", str(recipe), "--budget", budget, "--on", "raw", "--quiet")
        assert code == 0, (budget, err)


def test_help_shows_the_measure_choices() -> None:
    for cmd in ("run", "ladder", "audit"):
        code, out, _ = invoke(cmd, "--help")
        assert code == 0
        assert "--on [raw|gzip|brotli]" in out, cmd


def test_set_overrides_are_validated_like_the_file(tmp_path: Path) -> None:
    recipe = project(tmp_path)
    code, _, err = invoke("run", str(recipe), "--set", "group.hex.levels=[5, 7]")
    assert code == 2
    assert one_error_line(err) == (
        "error: recipe.toml: group.hex.levels: must go from finest to coarsest (strictly "
        "decreasing resolutions), but 5 is followed by 7"
    )


def test_ladder_table_marks_chosen_and_json_lists_candidates(tmp_path: Path) -> None:
    recipe = project(tmp_path)
    code, out, err = invoke("ladder", str(recipe))
    assert code == 0, err
    chosen = [ln for ln in out.splitlines() if ln.startswith("*")]
    assert len(chosen) == 1
    code, out, err = invoke("ladder", str(recipe), "--json", "--budget", "20KB", "--exact")
    assert code == 0, err
    doc = json.loads(out)
    assert doc["budget"]["max"] == 20000
    assert sum(c["chosen"] for c in doc["candidates"]) == 1
    for c in doc["candidates"]:
        assert c["fits"] == (c["gzip"] <= 20000)
        assert c["brotli"] is not None and not c["estimated"]


def test_ladder_shows_the_searchs_estimates_marked_and_exact_measures_them(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    lower_sample_thresholds(monkeypatch)
    recipe = project(tmp_path, df=events(20_000, seed=3))
    args = ("ladder", str(recipe), "--budget", "40KB", "--no-cache", "-q")
    code, out, err = invoke(*args, "--json")
    assert code == 0, err
    quick = json.loads(out)["candidates"]
    estimated = [c for c in quick if c["estimated"]]
    assert estimated, "the search judged some level from cheap evidence"
    assert not [c for c in quick if c["chosen"] and (c["estimated"] or c["gzip"] is None)]
    code, table, _ = invoke(*args)
    assert code == 0
    marked = [ln for ln in table.splitlines() if ln.rstrip().endswith(("~no", "~yes"))]
    assert len(marked) == sum(c["fits"] is not None for c in estimated)
    assert "~: not measured exactly" in table
    for c in estimated:
        if c["gzip"] is None and c["guess"] is not None:
            assert f"~{c['guess']:,}" in table
    code, out, _ = invoke(*args, "--json", "--exact")
    exact = json.loads(out)["candidates"]
    assert code == 0 and not [c for c in exact if c["estimated"] or c["gzip"] is None]
    # Whatever the quick ladder shows without ~ is what --exact measures for that level.
    by_level = {json.dumps(c["level"], sort_keys=True): c for c in exact}
    shared = [c for c in quick if json.dumps(c["level"], sort_keys=True) in by_level]
    assert shared  # the coarsest level is evaluated by both
    for c in shared:
        e = by_level[json.dumps(c["level"], sort_keys=True)]
        if c["rows_estimated"]:  # rows from a sample, shown as such
            assert c["estimated"] and f"~{c['rows']:,}" in table
        else:
            assert c["rows"] == e["rows"]
        for m in ("raw", "gzip", "brotli"):
            assert c[m] is None or c[m] == e[m], (c["level"], m)


def test_warm_ladder_after_a_run_prints_the_figures_without_measuring(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from reduce import sizes

    lower_sample_thresholds(monkeypatch)
    recipe = project(tmp_path, df=events(20_000, seed=3))
    code, _, err = invoke("run", str(recipe), "--budget", "40KB", "-q", "--json")
    assert code == 0, err
    code, cold, _ = invoke("ladder", str(recipe), "--budget", "40KB", "--json")
    assert code == 0

    def no(*a: object, **kw: object) -> object:
        raise AssertionError("measured again")

    from reduce import manifest, measure, pipeline

    for module in (sizes, measure, pipeline, manifest):  # where the names are imported
        for name in (
            "gzip_bytes",
            "brotli_bytes",
            "fast_length",
            "quick_look",
            "measure_all",
            "fits_on",
            "size_on",
        ):
            if hasattr(module, name):
                monkeypatch.setattr(module, name, no)
    code, warm, err = invoke("ladder", str(recipe), "--budget", "40KB", "--json")
    assert code == 0, err
    before = {json.dumps(c["level"]): c for c in json.loads(cold)["candidates"]}
    after = json.loads(warm)["candidates"]
    assert [c["level"] for c in after if c["chosen"]] == [
        c["level"] for c in before.values() if c["chosen"]
    ]
    for c in after:  # every figure shown was known before (exact ones unchanged)
        b = before[json.dumps(c["level"])]
        assert c["rows"] == b["rows"]
        for m in ("raw", "gzip", "brotli"):
            assert c[m] is None or c[m] == b[m]


def test_every_command_has_help() -> None:
    ctx = __import__("click").Context(main)
    names = main.list_commands(ctx)
    assert {"run", "ladder", "check", "audit", "demo"} <= set(names)
    for name in names:
        cmd = main.get_command(ctx, name)
        assert cmd is not None and cmd.help, f"command {name} has no help text"
        code, out, _ = invoke(name, "--help")
        assert code == 0
        assert "Usage:" in out


def test_python_dash_m_runs_the_cli() -> None:
    import subprocess
    import sys

    res = subprocess.run(
        [sys.executable, "-m", "reduce", "--version"], capture_output=True, text=True, check=False
    )
    assert res.returncode == 0
    assert res.stdout.startswith("reduce, version ")


@pytest.mark.parametrize("mode", [[], ["--quiet"], ["--json"]])
def test_write_anyway_exits_1_in_every_output_mode(tmp_path: Path, mode: list[str]) -> None:
    recipe = project(tmp_path)
    code, out, err = invoke("run", str(recipe), "--budget", "300B", "--write-anyway", *mode)
    assert code == 1
    assert one_error_line(err).startswith(
        "error: recipe.toml: no level fits the budget of 300 B gzip: the smallest payload is "
    )
    assert (tmp_path / "out" / "hexmap.json").is_file()
    if mode == ["--json"]:
        assert json.loads(out)[0]["over_budget"] is True


def test_denominators_matching_no_key_is_exit_2_with_samples(tmp_path: Path) -> None:
    recipe = project(tmp_path, REGION_RECIPE)
    from tests._builders import write_population

    write_population(tmp_path, {"aaa": 1000, "bbb": 2000, "ccc": 3000, "ddd": 4000, "eee": 1})
    code, out, err = invoke("run", str(recipe), "--quiet")
    assert code == 2
    assert one_error_line(err) == (
        "error: pop.csv (normalize.denominators): none of its 5 keys in column 'prov' matches "
        "the 4 prov keys in the data (data: 'AAA', 'BBB', 'CCC' ...; table: 'aaa', 'bbb', "
        "'ccc' ...); make the table's keys match the data's"
    )
    assert not (tmp_path / "out").exists()


def test_partly_matching_denominators_warn_on_stderr_even_quiet_and_in_json(tmp_path: Path) -> None:
    recipe = project(tmp_path, REGION_RECIPE)
    from tests._builders import write_population

    write_population(tmp_path, {"AAA": 1000, "BBB": 2000, "CCC": 3000, "ZZZ": 5})
    code, out, err = invoke("run", str(recipe), "--quiet")
    assert code == 0, err
    assert out == ""
    lines = err.strip().splitlines()
    assert "warning: regions: keys in the data but not in the denominators: DDD" in lines
    assert "warning: regions: keys in the denominators but not in the data: ZZZ" in lines
    manifest = json.loads((tmp_path / "out" / "regions.json.manifest.json").read_bytes())
    assert manifest["denominators"]["data_only_keys"] == ["DDD"]
    assert manifest["denominators"]["denominator_only_keys"] == ["ZZZ"]
    code, out, err = invoke("run", str(recipe), "--json")
    assert code == 0, err
    doc = json.loads(out)[0]
    assert doc["denominators"]["data_only_keys"] == ["DDD"]
    assert doc["denominators"]["denominator_only_keys"] == ["ZZZ"]
    assert doc["denominators"]["rows_without_denominator"] > 0


def test_layout_that_does_not_match_the_output_file_name_is_exit_2_before_the_scan(
    tmp_path: Path,
) -> None:
    recipe = project(tmp_path)
    (tmp_path / "events.parquet").unlink()  # the scan would fail differently
    code, _, err = invoke("run", str(recipe), "--set", "output.layout=csv")
    assert code == 2
    assert one_error_line(err) == (
        "error: recipe.toml: output.path: 'out/hexmap.json' ends in .json, but output.layout "
        "'csv' writes .csv files; name the file hexmap.csv or change output.layout"
    )
    code, _, err = invoke(
        "run",
        str(recipe),
        "--set",
        "output.layout=csv",
        "--set",
        "output.path=out/hexmap.csv",
        "--quiet",
    )
    assert code == 2
    assert "events.parquet" in one_error_line(err)  # past the recipe: the missing source


def test_check_lists_every_problem_of_every_recipe(tmp_path: Path) -> None:
    good = project(tmp_path)
    bad_key = write_recipe(
        tmp_path, HEX_RECIPE.replace("[budget]", "[budget]\nmaxx = 3"), name="bad1.toml"
    )
    bad_col = write_recipe(
        tmp_path, HEX_RECIPE.replace('distinct = "who"', 'distinct = "whom"'), name="bad2.toml"
    )
    code, out, err = invoke("check", str(bad_key), str(good), str(bad_col))
    assert code == 2
    assert out.splitlines() == [
        f"{good}: ok (hexmap: 1 source file, columns ts, lat, lon, kind, who, sev)"
    ]
    assert err.splitlines() == [
        "error: bad1.toml: budget.maxx: unknown key (did you mean 'max'?); allowed here: max, "
        "on, order",
        "error: events.parquet: column 'whom' (from bad2.toml: measures.observers) is not in "
        "the source (did you mean 'who'?); columns are: ts, lat, lon, kind, prov, sev, conf, "
        "who",
    ]


def test_run_publishes_nothing_when_any_recipe_is_bad(tmp_path: Path) -> None:
    good = project(tmp_path)
    bad = write_recipe(
        tmp_path,
        HEX_RECIPE.replace('distinct = "who"', 'distinct = "whom"').replace(
            "out/hexmap.json", "out/other.json"
        ),
        name="bad.toml",
    )
    code, out, err = invoke("run", str(good), str(bad))
    assert code == 2
    assert one_error_line(err).startswith(
        "error: events.parquet: column 'whom' (from bad.toml: measures.observers)"
    )
    assert not (tmp_path / "out").exists()


def test_run_refuses_two_recipes_writing_one_file(tmp_path: Path) -> None:
    first = project(tmp_path)
    second = write_recipe(
        tmp_path, HEX_RECIPE.replace('name = "hexmap"', 'name = "again"'), name="second.toml"
    )
    code, out, err = invoke("run", str(first), str(second))
    assert code == 2
    assert one_error_line(err) == (
        "error: second.toml: output.path: writes out/hexmap.json, like recipe.toml; give each "
        "recipe its own output file"
    )
    assert not (tmp_path / "out").exists()
