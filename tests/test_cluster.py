"""Scale-out on Dask (trainer.cluster) on a real distributed.LocalCluster with worker processes:
evaluate and score equal the single-machine results, distributed training reaches the full-batch
optimum and survives a killed worker with the same weights, resume is bit for bit, bad addresses
and a missing extra are one-line errors, and the single-machine path never imports dask."""

import hashlib
import json
import math
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import distributed
import numpy as np
import pyarrow.parquet as pq
import pytest

from conftest import SMALL_SPEC, assert_one_line, make_model, make_table
from trainer import api
from trainer.api import demo_data_dir
from trainer.cli import main
from trainer.spec import load_spec, parse_spec

ROOT = Path(__file__).resolve().parents[1]
LOGS = demo_data_dir() / "logs"
REFINE = 10


@pytest.fixture(scope="session")
def client():
    """One small cluster for the whole session: two single-threaded worker processes."""
    import logging

    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0",
                                  silence_logs=logging.ERROR) as cluster, distributed.Client(cluster) as c:
        yield c


@pytest.fixture(scope="module")
def demo_model(tmp_path_factory):
    """A model with random weights for the demo spec (evaluate and score need no training)."""
    folder = tmp_path_factory.mktemp("model")
    make_model(load_spec(demo_data_dir() / "spec.json"), seed=3).save(folder)
    return folder


def assert_same_json(a, b, path="$"):
    """Equal keys everywhere; equal numbers to 1e-12 (relative or absolute); NaN equals NaN."""
    if isinstance(a, dict):
        assert isinstance(b, dict) and sorted(a) == sorted(b), path
        for k in a:
            assert_same_json(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list):
        assert isinstance(b, list) and len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b)):
            assert_same_json(x, y, f"{path}[{i}]")
    elif isinstance(a, float) or isinstance(b, float):
        assert (math.isnan(a) and math.isnan(b)) or math.isclose(a, b, rel_tol=1e-12, abs_tol=1e-12), (path, a, b)
    else:
        assert a == b, path


def test_evaluate_over_cluster_equals_single_machine_json(client, demo_model, tmp_path):
    # Reference: the single-machine evaluation of the same model and rows (whose figures are checked
    # against scikit-learn in test_evaluation.py and test_metrics.py). All eight demo days: eight
    # parts, merged by the tree; --by exercises the segment merge.
    args = ["evaluate", "--model", str(demo_model), "--data", str(LOGS), "--by", "campaign"]
    assert main(args + ["--json", str(tmp_path / "one.json")]) == 0
    assert main(args + ["--json", str(tmp_path / "many.json"), "--cluster", client.scheduler.address]) == 0
    one, many = (json.loads((tmp_path / f).read_text()) for f in ("one.json", "many.json"))
    assert one["rows"] == 200_000  # demo_data/README.md: eight days of 25,000 rows
    assert_same_json(one, many)


def test_score_dataset_equals_single_machine_bit_for_bit(demo_model, tmp_path, capsys):
    # Reference: the single-machine score file; row order per input file by the files read directly
    # with pyarrow; checksums by hashlib.sha256.
    single = tmp_path / "one.parquet"
    assert main(["score", "--model", str(demo_model), "--data", str(LOGS), "--out", str(single),
                 "--keep", "recipient_cohort", "hour"]) == 0
    out = tmp_path / "scores"
    args = ["score", "--model", str(demo_model), "--data", str(LOGS), "--out", str(out),
            "--keep", "recipient_cohort", "hour", "--cluster", "local:2"]
    assert main(args) == 0
    manifest = json.loads((out / "_parts.json").read_text())
    files = sorted(LOGS.rglob("*.parquet"))
    assert [p["input"] for p in manifest["parts"]] == [str(f.relative_to(LOGS)) for f in files]
    tables = []
    for part, src in zip(manifest["parts"], files):
        t = pq.read_table(out / part["file"])
        assert t.num_rows == part["rows"] == pq.ParquetFile(src).metadata.num_rows
        assert t.column("hour").to_pylist() == pq.read_table(src, columns=["hour"]).column("hour").to_pylist()
        assert hashlib.sha256((out / part["file"]).read_bytes()).hexdigest() == part["sha256"]
        tables.append(t)
    ref = pq.read_table(single)
    assert manifest["rows"] == ref.num_rows == 200_000
    many = np.concatenate([t.column("score").to_numpy() for t in tables])
    assert np.array_equal(many, ref.column("score").to_numpy())  # bit for bit, in input order
    assert sum((t.column("recipient_cohort").to_pylist() for t in tables), []) == \
        ref.column("recipient_cohort").to_pylist()
    capsys.readouterr()
    assert_one_line(main(args), capsys.readouterr().err, "--force")  # never overwritten without --force
    assert main(args + ["--force"]) == 0


def test_failed_score_leaves_no_manifest(client, tmp_path, capsys):
    # Common practice for dataset outputs: the completion marker appears only when every part is
    # written. The second file holds a NaN numeric feature, an error met by a worker mid-run.
    rng = np.random.default_rng(1)
    data = tmp_path / "logs"
    data.mkdir()
    for i in range(2):
        t = make_table(rng, 400)
        if i == 1:
            amount = t.column("amount").to_numpy(zero_copy_only=False).copy()
            amount[7] = np.nan
            t = t.set_column(t.schema.get_field_index("amount"), "amount", [amount])
        pq.write_table(t, data / f"part-{i}.parquet")
    folder = tmp_path / "model"
    spec = dict(SMALL_SPEC, time=None)
    spec.pop("time")
    make_model(parse_spec(spec)).save(folder)
    out = tmp_path / "scores"
    code = main(["score", "--model", str(folder), "--data", str(data), "--out", str(out),
                 "--cluster", client.scheduler.address])
    assert_one_line(code, capsys.readouterr().err, "amount")
    assert not (out / "_parts.json").exists()


@pytest.fixture(scope="module")
def cluster_run(client, tmp_path_factory):
    out = tmp_path_factory.mktemp("cluster-train") / "model"
    result = api.train(ROOT / "demo_data" / "spec.json", LOGS, out, end="2024-05-12", holdout_start="2024-05-13",
                       holdout_end="2024-05-13", cluster=client, refine_iterations=REFINE, quiet=True)
    return out, result.model


def test_distributed_train_reaches_full_batch_optimum(cluster_run, demo_optimum):
    # Reference: conftest.demo_optimum, the same objective minimized by scipy.optimize L-BFGS-B on one
    # machine, and its holdout log-loss by sklearn.metrics.log_loss.
    out, model = cluster_run
    assert demo_optimum["train_days"] == "2024-05-06..2024-05-12"
    assert model.info["holdout"]["log_loss"] <= 1.002 * demo_optimum["ll_star"]
    records = [json.loads(line) for line in (out / "metrics.jsonl").read_text().splitlines()]
    assert [r["phase"] for r in records] == ["online"] + ["refine"] * REFINE  # one table line per iteration
    assert all(r["holdout"]["rows"] == 25_000 for r in records)


@pytest.fixture(scope="module")
def small_logs(tmp_path_factory):
    """Four training files and a holdout file of the conftest's invented log (all feature kinds, row
    weights), with its spec."""
    root = tmp_path_factory.mktemp("small")
    rng = np.random.default_rng(8)
    for name, files in (("train", 4), ("holdout", 1)):
        (root / name).mkdir()
        for i in range(files):
            pq.write_table(make_table(rng, 3000), root / name / f"part-{i}.parquet", row_group_size=1000)
    spec = root / "spec.json"
    spec.write_text(json.dumps(SMALL_SPEC))
    return root, spec


def test_resume_from_a_refinement_checkpoint_is_bit_identical(client, small_logs, tmp_path):
    # Reference: the uninterrupted run (the tool's resume contract): 3 iterations, then resumed to 8
    # from the checkpoint written after the 3rd, against 8 in one go.
    root, spec = small_logs
    kw = dict(holdout=root / "holdout", cluster=client, batch_rows=500, quiet=True)
    ref = api.train(spec, root / "train", tmp_path / "ref", refine_iterations=8, **kw).model
    api.train(spec, root / "train", tmp_path / "m", refine_iterations=3, **kw)
    resumed = api.train(spec, root / "train", tmp_path / "m", refine_iterations=8, resume=True, **kw).model
    assert np.array_equal(resumed.weights, ref.weights) and resumed.intercept == ref.intercept
    lines = (tmp_path / "m" / "metrics.jsonl").read_text().splitlines()
    assert [json.loads(x)["pass"] for x in lines] == list(range(1, 10))


def test_worker_killed_mid_iteration_gives_the_same_weights(client, cluster_run, tmp_path):
    # Reference: the run without a kill (cluster_run). A worker process is SIGKILLed while it computes
    # a gradient of a refinement iteration; Dask recomputes its shards and tasks elsewhere.
    pids = client.run(os.getpid)
    killed = []

    def killer():
        deadline = time.monotonic() + 120
        while not killed and time.monotonic() < deadline:
            for worker, keys in client.processing().items():
                if any("_gradient_part" in str(k) for k in keys) and worker in pids:
                    os.kill(pids[worker], signal.SIGKILL)
                    killed.append(worker)
                    return
            time.sleep(0.01)

    thread = threading.Thread(target=killer, daemon=True)
    thread.start()
    model = api.train(ROOT / "demo_data" / "spec.json", LOGS, tmp_path / "m", end="2024-05-12",
                      holdout_start="2024-05-13", holdout_end="2024-05-13", cluster=client, refine_iterations=REFINE,
                      quiet=True).model
    thread.join()
    assert killed, "no gradient task was seen running"
    ref = cluster_run[1]
    assert np.array_equal(model.weights, ref.weights) and model.intercept == ref.intercept
    client.wait_for_workers(2, timeout=60)


@pytest.mark.parametrize("address, needle", [("tcp://127.0.0.1:9", "tcp://127.0.0.1:9"),
                                             ("local:0", "local:0"), ("somewhere", "somewhere")])
def test_bad_address_is_one_line(demo_model, address, needle, capsys):
    code = main(["evaluate", "--model", str(demo_model), "--data", str(LOGS), "--cluster", address])
    assert_one_line(code, capsys.readouterr().err, needle)  # project rule: one line naming it, exit 2


def test_single_machine_options_refused_with_cluster(tmp_path, capsys):
    # --epochs shapes single-machine passes only; with --cluster it is refused before any work.
    code = main(["train", "--spec", str(ROOT / "demo_data" / "spec.json"), "--data", str(LOGS), "--out",
                 str(tmp_path / "m"), "--epochs", "5", "--cluster", "local:2"])
    assert_one_line(code, capsys.readouterr().err, "--epochs")
    assert not (tmp_path / "m").exists()


BLOCK_DASK = """
import importlib.abc, sys
class Block(importlib.abc.MetaPathFinder):
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] in ("dask", "distributed"):
            raise ModuleNotFoundError(f"No module named {name!r}")
sys.meta_path.insert(0, Block())
from trainer.cli import main
sys.exit(main(sys.argv[1:]))
"""


def test_missing_extra_names_the_install_command(demo_model):
    # The extra's absence is simulated by an import blocker on sys.meta_path in a fresh interpreter.
    proc = subprocess.run([sys.executable, "-c", BLOCK_DASK, "evaluate", "--model", str(demo_model), "--data",
                           str(LOGS), "--cluster", "local:2"], capture_output=True, text=True, timeout=120)
    assert_one_line(proc.returncode, proc.stderr, 'pip install -e ".[dask]"')


IMPORTS_AFTER = """
import sys
from trainer.cli import main
for args in sys.argv[1:]:
    assert main(args.split("|")) == 0
print(sorted(m for m in sys.modules if m.split(".")[0] in ("dask", "distributed")))
"""


def test_single_machine_path_never_imports_dask(small_log, tmp_path):
    # The project rule "single-machine path never imports dask", checked in a fresh interpreter.
    data, spec = small_log
    model = tmp_path / "m"
    runs = [f"train|--spec|{spec}|--data|{data}|--out|{model}|--epochs|1|--quiet",
            f"evaluate|--model|{model}|--data|{data}",
            f"score|--model|{model}|--data|{data}|--out|{tmp_path / 's.parquet'}"]
    proc = subprocess.run([sys.executable, "-c", IMPORTS_AFTER, *runs], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip().splitlines()[-1] == "[]"
