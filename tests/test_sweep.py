"""Several L2 strengths from one read (trainer.sweep): each value's weights against a separate
single-value run, bit for bit; resume after SIGKILL; the auto grid and its narrowing rule; the memory
estimate; the report's chart; export of a value's model. The refusals are cases of
test_bad_inputs.py."""

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
from scipy.special import expit

from trainer import api
from trainer.checkpoint import load_checkpoint
from trainer.cli import main
from trainer.model import load_model
from trainer.reader import Reader, parse_day
from trainer.report import render_report
from trainer.run_folder import l2_label
from trainer.solvers.olbfgs import OnlineLBFGS
from trainer.spec import load_spec
from trainer.sweep import AUTO_GRID, AUTO_MARGIN, edge_note, grid, l2_option, narrowed, value_bytes
from trainer.training import TrainOptions

from conftest import SMALL_SPEC, batch_csr, make_table

VALUES = (1e-5, 1e-3, 3e-2)
#: The small log's days 1-2 train and day 3 is the holdout; 100-row batches: 22 batches, so pass 1 is
#: online and the later passes full-batch (more than 16 batches, and the log fits in memory).
SMALL = {"end": "2026-03-02", "holdout_start": "2026-03-03", "holdout_end": "2026-03-03", "batch_rows": 100,
         "epochs": 3, "seed": 3}


def without_times(record):
    return {k: v for k, v in record.items() if k not in ("train_seconds", "eval_seconds", "l2_strength")}


@pytest.mark.parametrize("full_batch_memory", [1024, 0])
def test_each_value_equals_its_own_single_value_run(small_log, tmp_path, full_batch_memory):
    # Reference: a separate single-value run of the same options and seed for each value (the sweep's
    # contract in the README: everything per value is what that run does); compared bit for bit.
    root, spec = small_log
    options = {**SMALL, "full_batch_memory": full_batch_memory}
    sweep = api.train(spec, root, tmp_path / "sweep", l2_strength=VALUES, quiet=True, **options)
    records = [json.loads(x) for x in (tmp_path / "sweep" / "metrics.jsonl").read_text().splitlines()]
    phases = set()
    for value in VALUES:
        single = api.train(spec, root, tmp_path / f"single-{value}", l2_strength=value, quiet=True, **options)
        mine = load_model(tmp_path / "sweep" / "l2" / l2_label(value))
        assert np.array_equal(mine.weights, single.model.weights)  # bit for bit
        assert mine.intercept == single.model.intercept
        theirs = [r for r in records if r["l2_strength"] == value]
        assert [without_times(r) for r in theirs] == [without_times(r) for r in single.per_pass]
        outcome = next(v for v in sweep.sweep if v["l2_strength"] == value)
        assert outcome["best_pass"] == single.best_pass and outcome["passes"] == single.passes
        phases |= {r["phase"] for r in theirs}
    assert phases == ({"online", "full-batch"} if full_batch_memory else {"online"})
    best = min(sweep.sweep, key=lambda v: v["holdout_loss"])
    assert sweep.l2_strength == best["l2_strength"] and sweep.best_pass == best["best_pass"]
    kept = load_model(tmp_path / "sweep")
    assert np.array_equal(kept.weights, load_model(best["model_dir"]).weights)
    assert json.loads((tmp_path / "sweep" / "run.json").read_text())["sweep"]["kept"] == best["l2_strength"]


def test_one_value_in_a_list_is_a_single_value_run(small_log, tmp_path):
    # Reference: the run of the plain number (the README: a single value behaves as before).
    root, spec = small_log
    one = api.train(spec, root, tmp_path / "list", l2_strength=[1e-3], quiet=True, **SMALL)
    plain = api.train(spec, root, tmp_path / "plain", l2_strength=1e-3, quiet=True, **SMALL)
    assert one.sweep is None and not (tmp_path / "list" / "l2").exists()
    assert np.array_equal(one.model.weights, plain.model.weights)
    assert [without_times(r) for r in one.per_pass] == [without_times(r) for r in plain.per_pass]
    assert "l2_strength" not in one.per_pass[0]


@pytest.fixture(scope="module")
def log_with_holdout(tmp_path_factory):
    root = tmp_path_factory.mktemp("sweeplog")
    rng = np.random.default_rng(17)
    (root / "train").mkdir()
    for i in range(3):
        pq.write_table(make_table(rng, 15_000), root / "train" / f"part-{i}.parquet", row_group_size=4000)
    pq.write_table(make_table(rng, 5_000), root / "holdout.parquet")
    spec = root / "spec.json"
    spec.write_text(json.dumps(SMALL_SPEC))
    return root, spec


def sweep_args(root, spec, out, *extra):
    return ["train", "--spec", str(spec), "--data", str(root / "train"), "--holdout",
            str(root / "holdout.parquet"), "--out", str(out), "--batch-rows", "500", "--epochs", "2",
            "--shuffle-buffer", "3000", "--seed", "4", "--l2-strength", "1e-4,1e-2", "--quiet", *extra]


def kill_after_first_checkpoint(args, out: Path) -> subprocess.Popen:
    """Run the command line in a subprocess and SIGKILL it as soon as its first checkpoint exists."""
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).parents[1]))
    proc = subprocess.Popen([sys.executable, "-m", "trainer", *args], env=env, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 120
    while not (out / "checkpoint.bin").exists() and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.005)
    proc.send_signal(signal.SIGKILL)
    proc.wait(60)
    return proc


@pytest.mark.parametrize("every", ["2000", "1000000000"])
def test_sweep_killed_and_resumed_is_bit_identical(log_with_holdout, tmp_path, every):
    # Reference: an uninterrupted sweep of the same command (the resume contract; comparing a resumed
    # run with a clean one is common practice for checkpointing systems). A checkpoint every 2000 rows
    # stops the run in pass 1 (online); with none before the pass ends, in pass 2 (full-batch).
    root, spec = log_with_holdout
    ref, cut = tmp_path / "ref", tmp_path / "cut"
    assert main(sweep_args(root, spec, ref, "--checkpoint-every", every)) == 0
    proc = kill_after_first_checkpoint(sweep_args(root, spec, cut, "--checkpoint-every", every), cut)
    assert proc.returncode == -signal.SIGKILL, "the run finished before it could be stopped"
    assert main(sweep_args(root, spec, cut, "--checkpoint-every", every, "--resume")) == 0
    arrays, _ = load_checkpoint(cut / "checkpoint.bin")  # after a full-batch pass: each value's weights alone
    assert sorted(arrays) == [f"l2/{l2_label(v)}/weights" for v in (1e-2, 1e-4)]
    for value in (1e-4, 1e-2):
        a = load_model(ref / "l2" / l2_label(value))
        b = load_model(cut / "l2" / l2_label(value))
        assert np.array_equal(a.weights, b.weights) and a.intercept == b.intercept  # bit for bit
    lines = [json.loads(x) for x in (cut / "metrics.jsonl").read_text().splitlines()]
    assert [(x["pass"], x["l2_strength"], x["phase"]) for x in lines] == [
        (1, 1e-4, "online"), (1, 1e-2, "online"), (2, 1e-4, "full-batch"), (2, 1e-2, "full-batch")]
    ref_lines = [json.loads(x) for x in (ref / "metrics.jsonl").read_text().splitlines()]
    assert [x["holdout"] for x in lines] == [x["holdout"] for x in ref_lines]
    assert json.loads((cut / "progress.json").read_text()) == json.loads((ref / "progress.json").read_text())


def test_sweep_resumed_from_its_weights_after_a_full_batch_pass_is_bit_identical(log_with_holdout, tmp_path):
    # Reference: an uninterrupted 3-pass sweep of the same command (the resume contract); the 2-pass run's
    # checkpoint holds each value's weights alone, from which pass 3 (full-batch) starts. Patience 3: no
    # value stops early, so both values take pass 3.
    root, spec = log_with_holdout
    ref, cut = tmp_path / "ref", tmp_path / "cut"
    assert main(sweep_args(root, spec, ref, "--epochs", "3", "--patience", "3")) == 0
    assert main(sweep_args(root, spec, cut, "--patience", "3")) == 0
    assert main(sweep_args(root, spec, cut, "--epochs", "3", "--patience", "3", "--resume")) == 0
    for value in (1e-4, 1e-2):
        a = load_model(ref / "l2" / l2_label(value))
        b = load_model(cut / "l2" / l2_label(value))
        assert np.array_equal(a.weights, b.weights) and a.intercept == b.intercept  # bit for bit
    holdout = [json.loads(x)["holdout"] for x in (cut / "metrics.jsonl").read_text().splitlines()]
    assert holdout == [json.loads(x)["holdout"] for x in (ref / "metrics.jsonl").read_text().splitlines()]


@pytest.mark.parametrize("l2,passes", [("1e-4,1e-2", 2), ("auto", 1)])
def test_a_sweep_resumed_with_more_passes_goes_on_as_one_started_with_them(log_with_holdout, tmp_path, l2,
                                                                            passes):
    # Reference: an uninterrupted 3-pass sweep of the same command (the resume contract). The decisions
    # a pass end takes only while passes remain are taken on the resume: a value's early stop (patience
    # 1; 1e-4 gets worse in pass 2 on this log), auto's narrowing after pass 1, the full-batch passes.
    root, spec = log_with_holdout
    ref, cut = tmp_path / "ref", tmp_path / "cut"
    assert main(sweep_args(root, spec, ref, "--epochs", "3", "--l2-strength", l2)) == 0
    assert main(sweep_args(root, spec, cut, "--epochs", str(passes), "--l2-strength", l2)) == 0
    assert main(sweep_args(root, spec, cut, "--epochs", "3", "--l2-strength", l2, "--resume")) == 0
    theirs = [json.loads(x) for x in (ref / "metrics.jsonl").read_text().splitlines()]
    ours = [json.loads(x) for x in (cut / "metrics.jsonl").read_text().splitlines()]
    assert [(x["pass"], x["l2_strength"], x["phase"], x["holdout"]) for x in ours] == \
        [(x["pass"], x["l2_strength"], x["phase"], x["holdout"]) for x in theirs]
    assert json.loads((cut / "run.json").read_text())["sweep"] == json.loads((ref / "run.json").read_text())["sweep"]
    for folder in sorted((ref / "l2").iterdir()):
        a, b = load_model(folder), load_model(cut / "l2" / folder.name)
        assert np.array_equal(a.weights, b.weights) and a.intercept == b.intercept  # bit for bit


@pytest.mark.parametrize("l2", ["1e-4", "1e-5,1e-4"])
def test_a_run_stopped_early_goes_on_when_resumed_with_a_larger_patience(log_with_holdout, tmp_path, l2):
    # Reference: an uninterrupted 3-pass run started with --patience 2 (the resume contract). With
    # patience 1, 1e-4 stops after pass 2 (its holdout loss gets worse there on this log, as 1e-5's
    # does: the sweep of both stops there); resumed with patience 2 it takes pass 3, as the run started
    # with patience 2 does.
    root, spec = log_with_holdout
    ref, cut = tmp_path / "ref", tmp_path / "cut"
    assert main(sweep_args(root, spec, ref, "--epochs", "3", "--patience", "2", "--l2-strength", l2)) == 0
    assert main(sweep_args(root, spec, cut, "--epochs", "3", "--patience", "1", "--l2-strength", l2)) == 0
    stopped = [json.loads(x) for x in (cut / "metrics.jsonl").read_text().splitlines()]
    assert [x["pass"] for x in stopped if x.get("l2_strength", 1e-4) == 1e-4] == [1, 2]
    assert main(sweep_args(root, spec, cut, "--epochs", "3", "--patience", "2", "--l2-strength", l2,
                           "--resume")) == 0
    theirs = [json.loads(x) for x in (ref / "metrics.jsonl").read_text().splitlines()]
    ours = [json.loads(x) for x in (cut / "metrics.jsonl").read_text().splitlines()]
    assert [x["pass"] for x in ours if x.get("l2_strength", 1e-4) == 1e-4] == [1, 2, 3]
    assert [(x["pass"], x.get("l2_strength"), x["phase"], x["holdout"]) for x in ours] == \
        [(x["pass"], x.get("l2_strength"), x["phase"], x["holdout"]) for x in theirs]
    folders = sorted((ref / "l2").iterdir()) if "," in l2 else [ref]
    for folder in folders:
        a, b = load_model(folder), load_model(cut / folder.relative_to(ref))
        assert np.array_equal(a.weights, b.weights) and a.intercept == b.intercept  # bit for bit


def test_a_resume_with_other_values_is_refused(log_with_holdout, tmp_path, capsys):
    # Reference: the resume contract (README: another weight-changing option is refused, naming it).
    root, spec = log_with_holdout
    out = tmp_path / "m"
    assert main(sweep_args(root, spec, out, "--epochs", "1")) == 0
    before = (out / "checkpoint.bin").read_bytes()
    args = sweep_args(root, spec, out, "--epochs", "1", "--resume")
    args[args.index("1e-4,1e-2")] = "1e-4,1e-3"
    assert main(args) == 2
    assert "--l2-strength differs" in capsys.readouterr().err
    assert (out / "checkpoint.bin").read_bytes() == before


def test_auto_grid_is_five_values_a_factor_of_about_3_apart_around_the_default():
    # Reference: the README's definition (half decades around the default 1e-4, one digit).
    assert AUTO_GRID == (1e-5, 3e-5, 1e-4, 3e-4, 1e-3)
    assert TrainOptions().l2_strength == 1e-4
    ratios = np.array(AUTO_GRID[1:]) / np.array(AUTO_GRID[:-1])
    assert np.all((ratios > 3.0 - 1e-9) & (ratios < 3.34))
    assert grid(1e-3) == (1e-4, 3e-4, 1e-3, 3e-3, 1e-2)
    assert l2_option("auto") == "auto" and l2_option("1e-4") == 1e-4
    assert l2_option("1e-5, 1e-4") == (1e-5, 1e-4)


def test_auto_rule_stops_values_clearly_worse_than_the_best_but_not_its_neighbours():
    # Reference: the rule as the README states it (more than AUTO_MARGIN above the best, not next to it
    # on the grid), on hand-made scores.
    values = AUTO_GRID
    best = 0.2
    clearly = best * (1 + AUTO_MARGIN) * 1.001
    close = best * (1 + AUTO_MARGIN) * 0.999
    scores = dict(zip(values, [clearly, clearly, best, clearly, close]))
    assert narrowed(values, scores) == [1e-5]  # 3e-5 and 3e-4 neighbour the best; 1e-3 is close
    scores = dict(zip(values, [best, clearly, clearly, clearly, clearly]))
    assert narrowed(values, scores) == [1e-4, 3e-4, 1e-3]
    assert narrowed(values, dict(zip(values, [best] * 5))) == []
    assert "largest" in edge_note(values, 1e-3)
    assert "--l2-strength 1e-04,3e-04,1e-03,3e-03,1e-02" in edge_note(values, 1e-3)
    assert "smallest" in edge_note(values, 1e-5) and edge_note(values, 1e-4) is None


def test_auto_run_trains_the_grid_and_records_what_it_narrowed(small_log, tmp_path, capsys):
    # Reference: the narrowing rule (narrowed, checked above) applied to the run's own pass-1 figures
    # as metrics.jsonl records them.
    root, spec = small_log
    r = api.train(spec, root, tmp_path / "auto", l2_strength="auto", **SMALL)
    out = capsys.readouterr().out
    records = [json.loads(x) for x in (tmp_path / "auto" / "metrics.jsonl").read_text().splitlines()]
    first = {x["l2_strength"]: x["holdout"]["log_loss"] for x in records if x["pass"] == 1}
    assert tuple(sorted(first)) == AUTO_GRID
    stopped = narrowed(AUTO_GRID, first)
    doc = json.loads((tmp_path / "auto" / "run.json").read_text())
    assert doc["options"]["l2_strength"] == "auto" and doc["sweep"]["narrowed"] == stopped
    for value in AUTO_GRID:
        passes = [x["pass"] for x in records if x["l2_strength"] == value]
        assert (passes == [1]) if value in stopped else len(passes) >= 2
        assert (tmp_path / "auto" / "l2" / l2_label(value) / "model.json").exists()
    assert f"kept l2 strength {l2_label(r.l2_strength)}" in out
    note = edge_note(AUTO_GRID, r.l2_strength)
    assert (note in out) if note else ("next grid" not in out)


def test_memory_estimate_is_the_arrays_the_solver_and_average_allocate():
    # Reference: numpy's nbytes of the arrays a fresh OnlineLBFGS allocates (the stored steps, the
    # direction, weights, curvature diagonal and batch bitmap) plus the float64 weights of the best pass's
    # model and the trainer's float64 average, and of the arrays of one value's full-batch pass over every
    # bucket: the L-BFGS-B driver's and its bounds, and six float64 vectors of minimize's own.
    from trainer.solvers.full_batch import LBFGSB

    n, history = 4096, 7
    s = OnlineLBFGS(n, "logistic", 1e-4, history=history)
    allocated = sum(a.nbytes for a in (s._S, s._q, s._x, s._diag, s._bits))
    driver = LBFGSB(n + 1, history, 1e-15, 1e-12)
    full = sum(a.nbytes for a in driver.arrays.values()) + sum(a.nbytes for a in driver._bounds)
    full += 6 * 8 * (n + 1)
    kept = np.zeros(n + 1).nbytes  # the best pass's model: a view of the weights-then-intercept copy
    assert value_bytes(n, TrainOptions(history=history)) == allocated + kept + 8 * (n + 1) + full
    assert value_bytes(n, TrainOptions(history=history, full_batch_memory=0)) == allocated + kept


def test_report_of_a_sweep_draws_every_value_and_pass(small_log, tmp_path):
    # Reference: metrics.jsonl (one record per value per pass) read with json; the chart's dots
    # counted with a plain string search of its SVG.
    root, spec = small_log
    r = api.train(spec, root, tmp_path / "m", l2_strength=VALUES, quiet=True, **SMALL)
    page = Path(api.report(tmp_path / "m")).read_text()
    records = [json.loads(x) for x in (tmp_path / "m" / "metrics.jsonl").read_text().splitlines()]
    at = page.index('aria-label="Holdout log-loss against L2 strength')
    chart = page[page.rindex("<svg", 0, at):page.index("</svg>", at)]
    assert chart.count("<circle") == len(records)
    assert chart.count("stroke-dasharray") == 2  # the kept value's line and its legend entry
    section = page[page.index("<h2>L2 strength</h2>"):page.index("<h2>Calibration")]
    assert section.count("<tr>") == 1 + len(VALUES) and section.count('<td class="t">kept</td>') == 1
    assert f"<td>{l2_label(r.l2_strength)}</td>" in section
    own = render_report({**_plain_run(), "sweep": None})
    assert own.count("<svg") == page.count("<svg") - 1


def _plain_run():
    return {"title": "t", "options": {}, "passes": [], "progress": [], "final_holdout": None,
            "top_weights": [], "loss": "logistic"}


def test_export_of_a_value_scores_like_the_in_run_model(small_log, tmp_path):
    # Reference: the in-run model's probabilities 1 / (1 + exp(-(X w + b))) with X the hashed holdout as
    # a scipy CSR matrix (scipy.special.expit), against `hashcurve score` of the value's export.
    root, spec = small_log
    api.train(spec, root, tmp_path / "m", l2_strength=VALUES, quiet=True, **SMALL)
    folder = tmp_path / "m" / "l2" / l2_label(VALUES[1])
    assert main(["export", "--model", str(folder), "--out", str(tmp_path / "x")]) == 0
    assert main(["score", "--model", str(tmp_path / "x"), "--data", str(root), "--start", "2026-03-03",
                 "--end", "2026-03-03", "--out", str(tmp_path / "s.parquet")]) == 0
    model = load_model(folder)
    day = parse_day("2026-03-03", "--start")
    reader = Reader(load_spec(spec), root, day, day,
                    batch_rows=1 << 20, with_labels=False)
    expected = np.concatenate([expit(batch_csr(b, model.spec.n_buckets) @ model.weights + model.intercept)
                               for b in reader.batches()])
    scores = pq.read_table(tmp_path / "s.parquet").column("score").to_numpy()
    np.testing.assert_allclose(scores, expected, rtol=0, atol=1e-12)
