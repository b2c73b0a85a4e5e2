"""The command line on bad input: one line on stderr, exit 2, no traceback, nothing written
(common practice for command-line tools: errors go to stderr with a non-zero status)."""

import json
import os
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from trainer.cli import main
from trainer.spec import load_spec

from conftest import SMALL_SPEC, assert_one_line, make_model, make_table


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
    assert_one_line(code, err, "column 'colour' named by the spec is not in the file")
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


def test_evaluate_by_names_the_option_that_named_the_column(small_log, tmp_path, capsys):
    root, spec = small_log
    make_model(load_spec(spec)).save(tmp_path / "m")
    code, err = run(capsys, "evaluate", "--model", str(tmp_path / "m"), "--data", str(root), "--by", "nosuchcol")
    assert_one_line(code, err, "column 'nosuchcol' named by --by is not in the file")


def test_evaluate_by_table_columns_line_up_and_no_empty_null_row(tmp_path, capsys):
    # a segment column without nulls, and every
    # row of the text table must end at the same column (our own layout; fixed-width columns are
    # common practice for terminal tables)
    rng = np.random.default_rng(3)
    table = make_table(rng, 900)
    region = pa.array(rng.choice(["north", "south", "east"], 900))
    pq.write_table(table.append_column("region", region), tmp_path / "log.parquet")
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps(SMALL_SPEC))
    make_model(load_spec(spec)).save(tmp_path / "m")
    code = main(["evaluate", "--model", str(tmp_path / "m"), "--data", str(tmp_path / "log.parquet"),
                 "--by", "region"])
    out = capsys.readouterr().out
    assert code == 0
    rows = out.split("log-loss\n", 2)[-1].splitlines()
    values, counts = np.unique(region.to_numpy(zero_copy_only=False).astype(str), return_counts=True)
    assert [r.split()[0] for r in rows] == list(values[np.lexsort((values, -counts))])  # numpy count order
    assert "(null)" not in out
    assert len({len(r) for r in rows}) == 1


LOADED_AFTER = """
import json, sys
from trainer.cli import main
try:
    main(sys.argv[1].split("|"))
except SystemExit:  # --help
    pass
print(json.dumps(sorted(set(sys.modules) & {"numpy", "pyarrow", "numba", "pandas", "scipy.special", "scipy.optimize"})))
"""


def _loaded_after(argv: str) -> list:
    """The heavy modules loaded by one command line run in a fresh interpreter."""
    proc = subprocess.run([sys.executable, "-c", LOADED_AFTER, argv], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout.strip().splitlines()[-1])


def test_start_up_loads_only_what_the_command_needs(small_log, tmp_path):
    # The README's start-up figures rest on these (Performance, fixed cost of a run): help loads no
    # numeric library; an online run with a holdout never loads pandas (pyarrow imports it on its
    # numpy conversions; the reader reads Arrow buffers instead), nor scipy's special functions
    # or optimizers (the project's expit kernel; L-BFGS-B only for a full-batch pass).
    root, spec = small_log
    assert _loaded_after("--help") == []
    assert _loaded_after("train|--help") == []
    run = (f"train|--spec|{spec}|--data|{root}|--out|{tmp_path / 'm'}|--epochs|1|--quiet|--full-batch-memory|0"
           "|--end|2026-03-02|--holdout-start|2026-03-03|--holdout-end|2026-03-03")
    assert _loaded_after(run) == ["numba", "numpy", "pyarrow"]


def test_output_closed_early_ends_quietly(tmp_path):
    # Reference: the Python documentation's note on SIGPIPE (from memory: catch BrokenPipeError, point
    # stdout at os.devnull, exit 1) - what `hashcurve inspect M | head` needs so no traceback is printed.
    from pathlib import Path

    from trainer.spec import parse_spec

    make_model(parse_spec(SMALL_SPEC)).save(tmp_path / "m")
    env_path = str(Path(__file__).parents[1])
    proc = subprocess.Popen([sys.executable, "-m", "trainer", "inspect", "--model", str(tmp_path / "m"), "--json"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, cwd=env_path)
    proc.stdout.close()  # no reader left: the first write fails with EPIPE
    err = proc.stderr.read().decode()
    assert proc.wait(60) == 1 and err == "", err


def test_command_line_runs_blas_on_one_thread():
    # Reference: threadpoolctl's report of the loaded BLAS libraries (a general-purpose library, the test
    # extra's scikit-learn depends on it); the command line's process settings run before numpy loads.
    code = ("import trainer.cli as c; c.configure_process(); import numpy, scipy.linalg; "
            "from threadpoolctl import threadpool_info; "
            "print(sorted({i['num_threads'] for i in threadpool_info() if i['internal_api'] == 'openblas'}))")
    env = {k: v for k, v in os.environ.items() if k != "OPENBLAS_NUM_THREADS"}
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, check=True).stdout
    assert out.strip() == "[1]"
