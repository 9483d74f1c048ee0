"""Tests of the ``reduce audit`` click command (``reduce.audit.cli.audit``).

Exit codes: 0 clean, 1 findings (inconsistent payload, over budget), 2 bad input. Findings are
``PATH: problem`` lines on stderr; errors a single ``error: ...`` line without a traceback.
External references: hashlib SHA-256, stdlib gzip (RFC 1952) and json.
"""

from __future__ import annotations

import gzip
import hashlib
import json
import os
from pathlib import Path
from typing import Any

import pytest
from click.testing import CliRunner, Result

from reduce.cli import main
from tests import _builders as builders

SAFE = "outside the JavaScript safe range ±(2^53-1)"


def run(*args: object) -> Result:
    return CliRunner().invoke(main, ["audit", *(str(a) for a in args)], catch_exceptions=False)


def stderr_lines(result: Result) -> list[str]:
    return result.stderr.splitlines()


def broken(tmp_path: Path, **overrides: Any) -> Path:
    payload = builders.columns_payload(**overrides)
    return builders.write_payload(tmp_path / "x.json", payload)


def test_clean_payload_exit_0(tmp_path: Path) -> None:
    path = builders.write_payload(tmp_path / "x.json")
    result = run(path)
    assert result.exit_code == 0, result.output
    assert result.stderr == ""
    assert f"{path}  [reduce.columns/1]" in result.stdout
    assert "no problems" in result.stdout


def test_short_column_exit_1(tmp_path: Path) -> None:
    columns = builders.columns_payload()["columns"] | {"t": [1700000000]}
    path = broken(tmp_path, columns=columns)
    result = run(path)
    assert result.exit_code == 1
    assert stderr_lines(result) == [f"{path}: column 't' has 1 values, expected rows = 3"]


def test_nan_written_by_hand_exit_1(tmp_path: Path) -> None:
    text = builders.dump(builders.columns_payload()).replace(b"[12,5,7]", b"[12,5,\n NaN]")
    path = builders.write_bytes(tmp_path / "x.json", text)
    builders.write_manifest(path)
    result = run(path)
    assert result.exit_code == 1
    byte = text.index(b"NaN")
    assert stderr_lines(result) == [
        (
            f"{path}: not valid JSON (RFC 8259): NaN is not a JSON value at line 2 column 2 "
            f"(byte {byte})"
        )
    ]


def test_integer_2_pow_60_exit_1(tmp_path: Path) -> None:
    columns = builders.columns_payload()["columns"] | {"t": [1700000000, 2**60, 1]}
    path = broken(tmp_path, columns=columns)
    result = run(path)
    assert result.exit_code == 1
    assert stderr_lines(result) == [
        f"{path}: column 't': integer 1152921504606846976 at row 1 is {SAFE}"
    ]


def test_wrong_manifest_checksum_exit_1(tmp_path: Path) -> None:
    path = builders.write_payload(tmp_path / "x.json")
    builders.write_manifest(path, sha256="ab" * 32)
    digest = hashlib.sha256(path.read_bytes()).hexdigest()  # hashlib SHA-256
    result = run(path)
    assert result.exit_code == 1
    assert stderr_lines(result) == [
        (
            f"{path}: manifest x.json.manifest.json key 'sha256': \"abababababababab…\" does "
            f'not match the payload\'s sha256 "{digest[:16]}…"'
        )
    ]


def test_broken_accounting_exit_1(tmp_path: Path) -> None:
    accounting = builders.columns_payload()["accounting"] | {"input_rows": 31}
    path = broken(tmp_path, accounting=accounting)
    result = run(path)
    assert result.exit_code == 1
    assert stderr_lines(result) == [
        (
            f"{path}: accounting: input_rows 31 != filtered_rows 2 + invalid_rows 1 + "
            "suppressed_rows 3 + represented_rows 24 (= 30)"
        )
    ]


def test_index_outside_dictionary_exit_1(tmp_path: Path) -> None:
    columns = builders.columns_payload()["columns"] | {"kind": [0, 1, 7]}
    path = broken(tmp_path, columns=columns)
    result = run(path)
    assert result.exit_code == 1
    assert stderr_lines(result) == [
        (
            f"{path}: column 'kind': index 7 at row 2 is outside its dictionary of 3 labels "
            "(valid 0..2)"
        )
    ]


def test_several_problems_one_line_each(tmp_path: Path) -> None:
    columns = builders.columns_payload()["columns"] | {"kind": [0, 1, 7], "count": [1]}
    path = broken(tmp_path, columns=columns)
    result = run(path, "--quiet")
    assert result.exit_code == 1
    assert result.stdout == ""
    assert stderr_lines(result) == [
        f"{path}: column 'count' has 1 values, expected rows = 3",
        (
            f"{path}: column 'kind': index 7 at row 2 is outside its dictionary of 3 labels "
            "(valid 0..2)"
        ),
    ]


# ---------------------------------------------------------------------------- budgets


def _site(tmp_path: Path) -> tuple[Path, Path, Path]:
    small = builders.write_payload(tmp_path / "data" / "small.json")
    rows = [{"v": i * 7919 % 10007} for i in range(2000)]
    big = builders.write_bytes(tmp_path / "data" / "big.json", builders.dump(rows))
    return small, big, tmp_path / "budgets.toml"


def test_budgets_file_under_exit_0(tmp_path: Path) -> None:
    small, big, budgets = _site(tmp_path)
    budgets.write_text(
        '[[file]]\nglob = "data/big.json"\nmax = "100KB"\n\n'
        '[[file]]\nglob = "data/*.json"\nmax = "10KB"\non = "raw"\n\n'
        '[total]\nmax = "1MB"\non = "gzip"\n'
    )
    result = run(small, big, "--budgets", budgets)
    assert result.exit_code == 0, result.stderr
    assert result.stderr == ""


def test_budgets_file_over_exit_1(tmp_path: Path) -> None:
    small, big, budgets = _site(tmp_path)
    budgets.write_text('[[file]]\nglob = "data/*.json"\nmax = "1KB"\n[total]\nmax = 2000\n')
    big_gzip = len(gzip.compress(big.read_bytes(), 9, mtime=0))  # stdlib gzip, RFC 1952
    small_gzip = len(gzip.compress(small.read_bytes(), 9, mtime=0))
    assert big_gzip > 2000 and small_gzip < 1000  # preconditions of this scenario
    result = run(tmp_path / "data", "--budgets", budgets, "--quiet")
    assert result.exit_code == 1
    total = big_gzip + small_gzip
    assert stderr_lines(result) == [
        (
            f"{big}: over budget: gzip {big_gzip:,} B > 1,000 B "
            f"({big_gzip / 1000:.1f} KB > 1.0 KB; {budgets} [[file]] #1 glob 'data/*.json')"
        ),
        (
            f"total: over total budget: gzip {total:,} B summed over 2 files > 2,000 B "
            f"({total / 1000:.1f} KB > 2.0 KB; {budgets} [total])"
        ),
    ]


def test_budget_and_total_options(tmp_path: Path) -> None:
    small, big, _ = _site(tmp_path)
    raw = small.stat().st_size + big.stat().st_size
    ok = run(small, big, "--budget", "1MB", "--on", "raw", "--total", str(raw))
    assert ok.exit_code == 0, ok.stderr
    over = run(small, big, "--on", "raw", "--total", str(raw - 1), "-q")
    assert over.exit_code == 1
    assert [line.split(":")[0] for line in stderr_lines(over)] == ["total"]


def test_budgets_unknown_key_exit_2_with_hint(tmp_path: Path) -> None:
    small, _, budgets = _site(tmp_path)
    budgets.write_text('[[file]]\nglob = "data/*.json"\nmx = "1KB"\n')
    result = run(small, "--budgets", budgets)
    assert result.exit_code == 2
    assert result.stdout == ""
    assert stderr_lines(result) == [
        (
            f"error: {budgets}: [[file]] #1: unknown key 'mx' (did you mean 'max'?); "
            "allowed: glob, max, on"
        )
    ]


def test_budgets_bad_size_exit_2(tmp_path: Path) -> None:
    small, _, budgets = _site(tmp_path)
    budgets.write_text('[total]\nmax = "12 parsecs"\n')
    result = run(small, "--budgets", budgets)
    assert result.exit_code == 2
    assert stderr_lines(result) == [
        (
            f"error: {budgets}: [total] key 'max': '12 parsecs' is not a size; use e.g. 300KB, "
            "1.5MB, 200KiB or 250000"
        )
    ]


def test_missing_file_exit_2_one_line(tmp_path: Path) -> None:
    result = run(tmp_path / "nope.json")
    assert result.exit_code == 2
    assert stderr_lines(result) == [f"error: {tmp_path / 'nope.json'}: no such file or folder"]
    assert "Traceback" not in result.output


def test_missing_budgets_file_exit_2(tmp_path: Path) -> None:
    small, _, budgets = _site(tmp_path)
    result = run(small, "--budgets", budgets)
    assert result.exit_code == 2
    assert stderr_lines(result) == [f"error: {budgets}: budgets file not found"]


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (
            ["--budget", "lots"],
            "error: --budget: 'lots' is not a size; use e.g. 300KB, 1.5MB, 200KiB or 250000",
        ),
        (
            ["--on", "gzipp"],
            "error: --on: 'gzipp' is not a measure (did you mean 'gzip'?); use raw, gzip or brotli",
        ),
        (["--json", "--markdown"], "error: --json and --markdown cannot be combined; choose one"),
    ],
)
def test_bad_options_exit_2(tmp_path: Path, args: list[str], message: str) -> None:
    path = builders.write_payload(tmp_path / "x.json")
    result = run(path, *args)
    assert result.exit_code == 2
    assert stderr_lines(result) == [message]


def test_no_path_exit_2() -> None:
    result = run()
    assert result.exit_code == 2
    assert stderr_lines(result) == [
        "error: no PATH given; name at least one file or folder to audit"
    ]


def test_unreadable_file_exit_2(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = builders.write_payload(tmp_path / "x.json")
    real = os.open

    def deny(file: Any, flags: int, *args: Any, **kwargs: Any) -> int:
        # Tests run as root here, so a chmod would not deny the read: refuse the open.
        if Path(file).name == "x.json":
            raise PermissionError(13, "Permission denied", str(file))
        return real(file, flags, *args, **kwargs)

    monkeypatch.setattr(os, "open", deny)
    result = run(path)
    assert result.exit_code == 2
    assert stderr_lines(result) == [f"error: {path}: cannot read (Permission denied)"]


# ---------------------------------------------------------------------------- formats


def test_json_output_is_the_report_as_json_with_exit_code(tmp_path: Path) -> None:
    path = builders.write_payload(tmp_path / "x.json")
    result = run(path, "--json", "--budget", "300KB")
    assert result.exit_code == 0
    doc = json.loads(result.stdout)  # stdlib json
    (entry,) = doc["files"]
    assert entry["path"] == str(path)
    assert entry["rows"] == 3 and entry["element_kind"] == "cells"
    assert entry["surface"] == "SVG/DOM"
    assert entry["budget"]["max"] == 300_000 and entry["budget"]["over"] is False
    assert entry["bytes"]["gzip"] == len(gzip.compress(path.read_bytes(), 9, mtime=0))


def test_markdown_output_is_a_table_for_a_pull_request(tmp_path: Path) -> None:
    path = builders.write_payload(tmp_path / "x.json")
    result = run(path, "--markdown")
    assert result.exit_code == 0
    assert result.stdout.startswith("### reduce audit\n")
    assert f"| `{path}` | reduce.columns/1 |" in result.stdout


def test_quiet_clean_prints_nothing(tmp_path: Path) -> None:
    path = builders.write_payload(tmp_path / "x.json")
    result = run(path, "--quiet")
    assert (result.exit_code, result.stdout, result.stderr) == (0, "", "")


def test_budgets_glob_matching_no_file_is_exit_2(tmp_path: Path) -> None:
    small, big, budgets = _site(tmp_path)
    budgets.write_text(
        '[[file]]\nglob = "data/*.json"\nmax = "1MB"\n\n'
        '[[file]]\nglob = "public/*.json"\nmax = "1KB"\n'
    )
    result = run(small, big, "--budgets", budgets)
    assert result.exit_code == 2
    assert stderr_lines(result) == [
        f"error: {budgets} [[file]] #2 glob 'public/*.json' matches none of the 2 audited "
        "files; fix the glob (relative to the budgets file's folder) or remove the rule"
    ]


def test_bytes_per_field_are_shown_on_the_budget_measure(tmp_path: Path) -> None:
    """A field's gzip bytes are the gzip size it adds: the payload compressed with it minus
    without it (Python's gzip module at level 9, RFC 1952)."""
    import json

    rows = [{"same": "constant text", "noise": f"{i * 7919 % 10007:05d}"} for i in range(2000)]
    path = builders.write_bytes(tmp_path / "rows.json", builders.dump(rows))
    result = run(path, "--budget", "1MB", "--on", "gzip", "--json")
    assert result.exit_code == 0, result.stderr
    fields = {f["name"]: f for f in json.loads(result.stdout)["files"][0]["fields"]}

    def gz(doc: object) -> int:
        import orjson

        return len(gzip.compress(orjson.dumps(doc), 9, mtime=0))

    whole = gz(rows)
    for name, other in (("same", "noise"), ("noise", "same")):
        want = whole - gz([{other: r[other]} for r in rows])
        assert fields[name]["measured"] == {"on": "gzip", "bytes": want}
    # the raw bytes of the two fields are alike; compressed, the varying one costs far more
    assert fields["noise"]["measured"]["bytes"] > 5 * fields["same"]["measured"]["bytes"]
    table = run(path, "--budget", "1MB", "--on", "gzip")
    assert "gzip bytes" in table.stdout


def test_command_line_budget_wins_over_the_budgets_file(tmp_path: Path) -> None:
    small, big, budgets = _site(tmp_path)
    budgets.write_text('[[file]]\nglob = "data/*.json"\nmax = "1KB"\n[total]\nmax = 10\n')
    result = run(small, big, "--budgets", budgets, "--budget", "1MB", "--total", "1MB")
    assert result.exit_code == 0, result.stderr  # the file's 1 KB and 10 B are not used
    assert "[--budget]" in result.stdout and "[--total]" in result.stdout
