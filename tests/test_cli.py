"""The command line on bad input: one line on stderr, exit 2, no traceback, nothing written
(common practice for command-line tools: errors go to stderr with a non-zero status)."""

import json


from trainer.cli import main

from conftest import SMALL_SPEC, assert_one_line


def run(capsys, *argv):
    code = main(list(argv))
    err = capsys.readouterr().err.strip()
    return code, err


def test_missing_data_folder(small_log, tmp_path, capsys):
    _, spec = small_log
    code, err = run(capsys, "train", "--spec", str(spec), "--data", str(tmp_path / "nope"), "--out", str(tmp_path / "m"))
    assert_one_line(code, err, "no such file or folder")
    assert not (tmp_path / "m").exists()


def test_spec_not_json_and_schema_failure(small_log, tmp_path, capsys):
    root, _ = small_log
    bad = tmp_path / "bad.json"
    bad.write_text("{")
    code, err = run(capsys, "train", "--spec", str(bad), "--data", str(root), "--out", str(tmp_path / "m"))
    assert_one_line(code, err, "not valid JSON")
    bad.write_text(json.dumps({**SMALL_SPEC, "hashing": {"bits": 40}}))
    code, err = run(capsys, "train", "--spec", str(bad), "--data", str(root), "--out", str(tmp_path / "m"))
    assert_one_line(code, err, "hashing.bits")
    assert not (tmp_path / "m").exists()


def test_column_absent_names_column_and_file(small_log, tmp_path, capsys):
    root, _ = small_log
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps({**SMALL_SPEC, "features": SMALL_SPEC["features"] + [
        {"column": "colour", "kind": "categorical"}]}))
    code, err = run(capsys, "train", "--spec", str(spec), "--data", str(root), "--out", str(tmp_path / "m"))
    assert_one_line(code, err, "column 'colour' named in the spec is not in the file")
    assert ".parquet" in err


def test_date_filter_selecting_nothing(small_log, tmp_path, capsys):
    root, spec = small_log
    code, err = run(capsys, "train", "--spec", str(spec), "--data", str(root), "--out", str(tmp_path / "m"),
                    "--start", "2030-01-01")
    assert_one_line(code, err, "selects no files")
    code, err = run(capsys, "train", "--spec", str(spec), "--data", str(root), "--out", str(tmp_path / "m"),
                    "--start", "2026-13-01")
    assert_one_line(code, err, "expected a date YYYY-MM-DD")
    assert not (tmp_path / "m").exists()


def test_unknown_command_and_option(capsys):
    code, err = run(capsys, "fly")
    assert_one_line(code, err, "invalid choice")
    code, err = run(capsys, "train", "--spec", "x", "--data", "y", "--out", "z", "--colour", "red")
    assert_one_line(code, err, "--colour")
