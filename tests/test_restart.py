"""The model folder's life across failures: a run killed before its first checkpoint starts again
(on --resume or the same command), other options are refused naming the option, a second live run
is refused, and a file that breaks in the middle of a run keeps the checkpoint for --resume.

Reference for the weights: an uninterrupted run of the same command (the README's resume contract;
common practice for checkpointing systems). Refusals: the README's one-line, exit-2 rule.
"""

import fcntl
import json
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest

from trainer.checkpoint import load_checkpoint
from trainer.cli import main
from trainer.model import load_model

from conftest import SMALL_SPEC, assert_one_line, write_parts


@pytest.fixture(scope="module")
def job(tmp_path_factory):
    root = tmp_path_factory.mktemp("restart")
    rng = np.random.default_rng(8)
    data = write_parts(root / "train", rng, 3000)
    spec = root / "spec.json"
    spec.write_text(json.dumps(SMALL_SPEC))

    def argv(out, *extra):  # online passes only (--full-batch-memory 0): checkpoints every 1000 rows
        return ["train", "--spec", str(spec), "--data", str(data), "--out", str(out), "--batch-rows", "500",
                "--epochs", "2", "--checkpoint-every", "1000", "--full-batch-memory", "0", "--quiet", *extra]

    assert main(argv(root / "ref")) == 0
    return root, argv, load_model(root / "ref")


def same_weights(folder, ref):
    got = load_model(folder)
    return np.array_equal(got.weights, ref.weights) and got.intercept == ref.intercept


def killed_before_first_checkpoint(argv, out: Path) -> None:
    """Run the command as a subprocess and SIGKILL it as soon as run.json exists."""
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).parents[1]))
    proc = subprocess.Popen([sys.executable, "-m", "trainer", *argv], env=env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 120
    while not (out / "run.json").exists() and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.001)
    proc.kill()
    proc.wait(60)
    assert (out / "run.json").exists() and not (out / "checkpoint.bin").exists()


def test_run_killed_before_its_first_checkpoint_starts_again(job, tmp_path, capsys):
    root, argv, ref = job
    out = tmp_path / "m"
    killed_before_first_checkpoint(argv(out), out)
    run_json = (out / "run.json").read_bytes()
    code = main(argv(out, "--l2-strength", "0.01"))
    assert_one_line(code, capsys.readouterr().err.strip(), "--l2-strength differs")
    code = main(argv(out, "--l2-strength", "0.01", "--resume"))
    assert_one_line(code, capsys.readouterr().err.strip(), "run.json: cannot resume: --l2-strength differs")
    assert (out / "run.json").read_bytes() == run_json and sorted(p.name for p in out.iterdir()) == ["run.json"]
    assert main(argv(out)) == 0  # the same command again: nothing was lost, so it starts afresh
    assert same_weights(out, ref)


def test_second_live_run_in_the_folder_is_refused(job, tmp_path, capsys):
    _, argv, _ = job
    out = tmp_path / "busy"
    out.mkdir()
    fd = os.open(out, os.O_RDONLY)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)  # what a running hashcurve train holds
        code = main(argv(out))
        assert_one_line(code, capsys.readouterr().err.strip(), "another hashcurve run is working in this folder")
        assert list(out.iterdir()) == []
    finally:
        os.close(fd)
    assert main(argv(out)) == 0


def test_file_breaking_mid_run_keeps_the_checkpoint_for_resume(job, tmp_path, capsys):
    # A data page of the second file's last row group is damaged (footer intact), so the run fails
    # after checkpoints were written: the message names the file and what is kept; once the file
    # is whole again, --resume ends with the uninterrupted run's weights.
    root, argv, ref = job
    data = tmp_path / "train"
    data.mkdir()
    good = root / "train" / "part-1.parquet"
    (data / "part-0.parquet").write_bytes((root / "train" / "part-0.parquet").read_bytes())
    raw = bytearray(good.read_bytes())
    col = pq.ParquetFile(good).metadata.row_group(2).column(0)
    at = col.data_page_offset + col.total_compressed_size // 2
    raw[at:at + 64] = bytes(b ^ 0xA5 for b in raw[at:at + 64])
    (data / "part-1.parquet").write_bytes(bytes(raw))
    args = argv(tmp_path / "m")
    args[args.index("--data") + 1] = str(data)
    code = main(args)
    err = capsys.readouterr().err.strip()
    assert_one_line(code, err, "part-1.parquet: column 'shop' holds dictionary codes outside its dictionary")
    assert "checkpoint.bin (in pass 1 after" in err and "--resume" in err
    load_checkpoint(tmp_path / "m" / "checkpoint.bin")
    (data / "part-1.parquet").write_bytes(good.read_bytes())
    assert main(args + ["--resume"]) == 0
    assert same_weights(tmp_path / "m", ref)
