"""Training workflow: exact resume after SIGKILL and SIGINT (real subprocesses), refusals that leave
files untouched, negative downsampling calibration, early stopping and bad options (exit 2)."""

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from trainer import api
from trainer.checkpoint import load_checkpoint
from trainer.cli import main
from trainer.model import load_model

from conftest import SMALL_SPEC, make_table


@pytest.fixture(scope="module")
def log_4files(tmp_path_factory):
    root = tmp_path_factory.mktemp("trainlog")
    rng = np.random.default_rng(11)
    for i in range(4):
        pq.write_table(make_table(rng, 15_000), root / f"part-{i}.parquet", row_group_size=4000)
    spec = root / "spec.json"
    spec.write_text(json.dumps(SMALL_SPEC))
    return root, spec


def cli_args(spec, data, out, *extra):
    return ["train", "--spec", str(spec), "--data", str(data), "--out", str(out), "--batch-rows", "500",
            "--epochs", "2", "--shuffle-buffer", "3000", "--seed", "4", "--quiet", *extra]


def weights_of(folder):
    m = load_model(folder)
    return m.weights, m.intercept


def run_and_stop(args, ckpt: Path, sig) -> int:
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).parents[1]))
    proc = subprocess.Popen([sys.executable, "-m", "trainer", *args], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 120
    while not ckpt.exists() and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.005)
    proc.send_signal(sig)
    proc.wait(60)
    return proc


@pytest.mark.parametrize("sig,every", [(signal.SIGKILL, "2000"), (signal.SIGINT, "2000"),
                                       (signal.SIGKILL, "1000000000")])
def test_resume_after_kill_is_bit_identical(log_4files, tmp_path, sig, every):
    # Reference: an uninterrupted run of the same command (the tool's own resume contract; checking a
    # resumed run against a clean one is common practice for checkpointing systems). Pass 1 is online,
    # pass 2 full-batch (the log fits in memory): a checkpoint every 2000 rows stops the run in pass 1,
    # before the phase changes; with none until the pass ends, the stop lands in the full-batch pass.
    data, spec = log_4files
    ref = tmp_path / "ref"
    assert main(cli_args(spec, data, ref, "--checkpoint-every", every)) == 0
    cut = tmp_path / "cut"
    proc = run_and_stop(cli_args(spec, data, cut, "--checkpoint-every", every), cut / "checkpoint.bin", sig)
    if sig == signal.SIGINT and proc.returncode == 130:
        assert b"--resume" in proc.stderr.read()  # SIGINT saves a checkpoint and says how to go on
    assert proc.returncode != 0, "the run finished before it could be stopped"
    assert main(cli_args(spec, data, cut, "--checkpoint-every", every, "--resume")) == 0
    w_ref, b_ref = weights_of(ref)
    w_cut, b_cut = weights_of(cut)
    assert np.array_equal(w_ref, w_cut) and b_ref == b_cut  # bit for bit (the resume contract)
    lines = [json.loads(x) for x in (cut / "metrics.jsonl").read_text().splitlines()]
    assert [x["pass"] for x in lines] == [1, 2]
    assert [x["phase"] for x in lines] == ["online", "full-batch"]
    assert json.loads((cut / "run.json").read_text())["phases"] == json.loads((ref / "run.json").read_text())["phases"]


def test_after_a_full_batch_pass_the_checkpoint_holds_the_weights_and_resumes_exactly(log_4files, tmp_path):
    # Reference: an uninterrupted 4-pass run of the same command (the resume contract). After pass 2, the
    # first full-batch pass, the checkpoint keeps the weights alone: the passes to come start from them.
    data, spec = log_4files
    ref, cut = tmp_path / "ref", tmp_path / "cut"
    assert main(cli_args(spec, data, ref, "--epochs", "4")) == 0
    assert main(cli_args(spec, data, cut, "--epochs", "2")) == 0
    arrays, meta = load_checkpoint(cut / "checkpoint.bin")
    assert list(arrays) == ["weights"] and arrays["weights"].shape == (2**SMALL_SPEC["hashing"]["bits"] + 1,)
    assert meta["state"]["phase"] == "full-batch" and meta["state"]["pass_index"] == 2
    assert main(cli_args(spec, data, cut, "--epochs", "4", "--resume")) == 0
    w_ref, b_ref = weights_of(ref)
    w_cut, b_cut = weights_of(cut)
    assert np.array_equal(w_ref, w_cut) and b_ref == b_cut  # bit for bit
    phases = [json.loads(x)["phase"] for x in (cut / "metrics.jsonl").read_text().splitlines()]
    assert phases == ["online", "full-batch", "full-batch", "full-batch"]


def test_a_run_resumed_with_more_passes_goes_on_as_one_started_with_them(log_4files, tmp_path):
    # Reference: an uninterrupted 3-pass run of the same command (the resume contract). A 1-pass run never
    # decides the switch to full-batch passes (no pass is left); resumed with --epochs 3 it takes it then.
    data, spec = log_4files
    ref, cut = tmp_path / "ref", tmp_path / "cut"
    assert main(cli_args(spec, data, ref, "--epochs", "3")) == 0
    assert main(cli_args(spec, data, cut, "--epochs", "1")) == 0
    assert main(cli_args(spec, data, cut, "--epochs", "3", "--resume")) == 0
    w_ref, b_ref = weights_of(ref)
    w_cut, b_cut = weights_of(cut)
    assert np.array_equal(w_ref, w_cut) and b_ref == b_cut  # bit for bit
    phases = [json.loads(x)["phase"] for x in (cut / "metrics.jsonl").read_text().splitlines()]
    assert phases == ["online", "full-batch", "full-batch"]
    assert json.loads((cut / "run.json").read_text())["phases"] == json.loads((ref / "run.json").read_text())["phases"]


def test_resume_refusals_leave_checkpoint_untouched(log_4files, tmp_path, capsys):
    # Common practice: refuse a mismatched or corrupt state and leave it as it was (byte comparison).
    data, spec = log_4files
    out = tmp_path / "m"
    assert main(cli_args(spec, data, out, "--epochs", "1")) == 0
    ckpt = out / "checkpoint.bin"
    before = ckpt.read_bytes()
    assert main(cli_args(spec, data, out, "--epochs", "1", "--l2-strength", "0.5", "--resume")) == 2
    assert "--l2-strength differs" in capsys.readouterr().err
    other = tmp_path / "other.json"
    other.write_text(json.dumps({**SMALL_SPEC, "hashing": {"bits": 13, "seed": 42}}))
    assert main(cli_args(other, data, out, "--epochs", "1", "--resume")) == 2
    assert "the spec differs" in capsys.readouterr().err
    ckpt.write_bytes(before[:-100])
    assert main(cli_args(spec, data, out, "--epochs", "1", "--resume")) == 2
    assert "corrupt" in capsys.readouterr().err
    assert ckpt.read_bytes() == before[:-100]
    assert main(cli_args(spec, data, out, "--epochs", "1")) == 2  # another run's folder
    assert "--force" in capsys.readouterr().err


@pytest.mark.parametrize("option,value,needle", [
    ("--epochs", "0", "--epochs"), ("--l2-strength", "-1", "--l2-strength"), ("--history", "0", "--history"),
    ("--batch-rows", "0", "--batch-rows"), ("--negative-keep-rate", "0", "--negative-keep-rate"),
    ("--negative-keep-rate", "1.5", "--negative-keep-rate"), ("--solver", "newton", "--solver"),
    ("--loss", "hinge", "--loss"), ("--epochs", "two", "--epochs"),
])
def test_bad_options_exit_2_and_write_nothing(log_4files, tmp_path, capsys, option, value, needle):
    # Common practice for command-line tools: usage errors exit 2 with one line on stderr.
    data, spec = log_4files
    out = tmp_path / "never"
    assert main(cli_args(spec, data, out) + [option, value]) == 2
    err = capsys.readouterr().err
    assert needle in err and len(err.strip().splitlines()) == 1 and "Traceback" not in err
    assert not out.exists()


def test_res_refuses_large_feature_space(log_4files, tmp_path, capsys):
    # RES keeps a dense n x n matrix ("RES: Regularized Stochastic BFGS Algorithm", IEEE TSP 2014), so
    # 2^16 buckets would need 32 GiB: refused, pointing to online L-BFGS.
    data, _ = log_4files
    spec = tmp_path / "big.json"
    spec.write_text(json.dumps({**SMALL_SPEC, "hashing": {"bits": 16, "seed": 42}}))
    assert main(cli_args(spec, data, tmp_path / "r") + ["--solver", "res"]) == 2
    assert "olbfgs" in capsys.readouterr().err
    assert not (tmp_path / "r").exists()


def test_negative_downsampling_stays_calibrated(tmp_path):
    # Published correction p = p'/(p' + (1-p')/Q) ("Practical Lessons from Predicting Clicks on Ads at
    # Facebook", ADKDD 2014); check: calibration ratio on an unsampled holdout within 2% of 1.
    # Base rate ~11% and 200k holdout rows keep the ratio's sampling noise near 0.7%.
    rng = np.random.default_rng(3)
    n, k = 500_000, 40
    shop = rng.integers(0, k, n)
    effect = rng.normal(-2.2, 0.6, k)
    y = rng.random(n) < 1 / (1 + np.exp(-effect[shop]))
    for name, sl in (("train", slice(0, 300_000)), ("hold", slice(300_000, n))):
        pq.write_table(pa.table({"shop": pa.array(shop[sl]), "y": pa.array(y[sl])}), tmp_path / f"{name}.parquet")
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps({"label": {"column": "y"}, "hashing": {"bits": 10},
                                "features": [{"column": "shop", "kind": "categorical"}]}))
    api.train(spec, tmp_path / "train.parquet", tmp_path / "m", holdout=tmp_path / "hold.parquet",
              negative_keep_rate=0.2, epochs=3, batch_rows=2000)
    s = api.evaluate(tmp_path / "m", tmp_path / "hold.parquet")
    assert abs(s["calibration_ratio"] - 1) < 0.02


def test_train_result_and_evaluation_result_match_the_files_written(small_log, tmp_path):
    # reference: the model folder's metrics.jsonl and the --json document, read back with the
    # standard library's json; weights read back by load_model
    root, spec = small_log
    r = api.train(spec, root, tmp_path / "m", holdout=root, epochs=2, patience=2, batch_rows=500)
    lines = [json.loads(x) for x in (tmp_path / "m" / "metrics.jsonl").read_text().splitlines()]
    assert r.per_pass == lines and r.passes == 2 and r.model_dir == tmp_path / "m" and not r.stopped_early
    assert r.best_pass == min(lines, key=lambda x: x["holdout"]["log_loss"])["pass"]
    assert r.train_seconds == sum(x["train_seconds"] for x in lines)
    assert np.array_equal(r.model.weights, load_model(tmp_path / "m").weights)
    s = api.evaluate(r.model_dir, root, json_out=tmp_path / "s.json")
    assert s.log_loss == s["log_loss"] == json.loads((tmp_path / "s.json").read_text())["log_loss"]
