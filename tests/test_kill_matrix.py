"""The kill matrix: a real `hashcurve train` subprocess of two passes is killed (SIGKILL) at ten points
spread over the run, then `--resume` must give the weights of an uninterrupted run bit for bit, and
whatever checkpoint the kill left must load.

Kill points are chosen from what the run has written, watched from outside (no hook in the tool):
the files in the model folder, the temporary file of an atomic write, the lines of metrics.jsonl and
the successive checkpoint files (each rename is a new inode). For a kill "during a write" the
process is first stopped (SIGSTOP) when the temporary file appears and killed only if that file is
still there, i.e. the write has not been renamed into place; otherwise it continues and the next
write is tried.

Reference: an uninterrupted run of the same command (the tool's resume contract, README
"Checkpoints"; comparing a resumed run with a clean one is common practice for checkpointing
systems).
"""

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

from trainer.checkpoint import load_checkpoint
from trainer.cli import main
from trainer.model import load_model

from conftest import SMALL_SPEC, make_table, write_parts

CKPT = "checkpoint.bin"


@pytest.fixture(scope="module")
def job(tmp_path_factory):
    root = tmp_path_factory.mktemp("killmatrix")
    rng = np.random.default_rng(21)
    data = write_parts(root / "train", rng, 2000)
    pq.write_table(make_table(rng, 800), root / "holdout.parquet")
    spec = root / "spec.json"  # 2^16 buckets: a checkpoint of 3.7 MB, so its write lasts long enough to be seen
    spec.write_text(json.dumps({**SMALL_SPEC, "hashing": {"bits": 16, "seed": 42}}))

    def argv(out):  # online passes only, so pass 2 has checkpoints to kill at (full-batch: test_training)
        return ["train", "--spec", str(spec), "--data", str(data), "--holdout", str(root / "holdout.parquet"),
                "--out", str(out), "--batch-rows", "400", "--epochs", "2", "--checkpoint-every", "1200",
                "--shuffle-buffer", "1000", "--seed", "3", "--full-batch-memory", "0", "--quiet"]

    ref = root / "ref"
    assert main(argv(ref)) == 0
    return argv, load_model(ref)


class Watch:
    """What the run has written so far, read from outside."""

    def __init__(self, out: Path):
        self.out = out
        self.inodes: list[int] = []
        self.names: set[str] = set()
        self.passes_done = 0
        self.inodes_at_pass: dict[int, int] = {}

    def poll(self) -> None:
        try:
            self.names = {e.name for e in os.scandir(self.out)}
        except FileNotFoundError:
            self.names = set()
            return
        if CKPT in self.names:
            try:
                ino = os.stat(self.out / CKPT).st_ino
            except FileNotFoundError:
                ino = None
            if ino is not None and (not self.inodes or self.inodes[-1] != ino):
                self.inodes.append(ino)
        if "metrics.jsonl" in self.names:
            try:
                n = sum(1 for line in (self.out / "metrics.jsonl").read_text().splitlines() if line.strip())
            except FileNotFoundError:
                n = self.passes_done
            if n != self.passes_done:
                self.passes_done = n
                self.inodes_at_pass[n] = len(self.inodes)

    def writing(self, prefix: str) -> bool:
        return any(n.startswith(prefix) and n.endswith(".tmp") for n in self.names)

    def writing_now(self, prefix: str) -> bool:
        try:
            return any(e.name.startswith(prefix) and e.name.endswith(".tmp") for e in os.scandir(self.out))
        except FileNotFoundError:
            return False


# name -> (condition on Watch, whether the kill must land inside the write of a file with that prefix)
POINTS = {
    "first second, only run.json": (lambda w: "run.json" in w.names and CKPT not in w.names, None),
    "during the first checkpoint write": (lambda w: CKPT not in w.names and w.writing(f".{CKPT}."), f".{CKPT}."),
    "at the first checkpoint": (lambda w: len(w.inodes) >= 1, None),
    "during a later checkpoint write": (lambda w: len(w.inodes) >= 2 and w.writing(f".{CKPT}."), f".{CKPT}."),
    "after three checkpoints": (lambda w: len(w.inodes) >= 3, None),
    "between passes, pass 1 recorded": (lambda w: w.passes_done >= 1, None),
    "at the checkpoint ending pass 1": (lambda w: w.passes_done >= 1 and len(w.inodes) > w.inodes_at_pass[1], None),
    "during a checkpoint write in pass 2": (lambda w: w.passes_done >= 1 and len(w.inodes) > w.inodes_at_pass[1] + 1
                                            and w.writing(f".{CKPT}."), f".{CKPT}."),
    "after pass 2 is recorded": (lambda w: w.passes_done >= 2, None),
    "during the final model write": (lambda w: w.passes_done >= 2 and (w.writing(".model.npz.")
                                                                       or w.writing(".model.json.")), ".model."),
}


def kill_at(argv, out: Path, condition, inside) -> bool:
    """Run the command and SIGKILL it when ``condition`` holds (inside a write of ``inside`` files
    when given). Returns True when the kill happened there, False when the run ended first."""
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).parents[1]))
    proc = subprocess.Popen([sys.executable, "-m", "trainer", *argv], env=env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    watch = Watch(out)
    deadline = time.monotonic() + 120
    try:
        while proc.poll() is None and time.monotonic() < deadline:
            watch.poll()
            if not condition(watch):
                time.sleep(0.0002)  # leave the core to the run; a checkpoint write lasts milliseconds
                continue
            if inside is None:
                proc.kill()
                return True
            proc.send_signal(signal.SIGSTOP)
            if watch.writing_now(inside):
                proc.kill()
                return True
            proc.send_signal(signal.SIGCONT)
        return False
    finally:
        if proc.poll() is None:
            proc.kill()
        proc.wait(60)


@pytest.mark.parametrize("point", list(POINTS))
def test_kill_then_resume_is_bit_identical(job, tmp_path, point):
    argv, ref = job
    condition, inside = POINTS[point]
    out = tmp_path / "m"
    for _attempt in range(3):  # a write can end before the watcher sees it; try a fresh run again
        if kill_at(argv(out), out, condition, inside):
            break
        for p in out.iterdir():
            p.unlink()
    else:
        pytest.fail(f"the run always ended before the kill point '{point}'")
    if (out / CKPT).exists():
        load_checkpoint(out / CKPT)  # the checkpoint a kill leaves is whole (the previous one during a write)
    assert main(argv(out) + ["--resume"]) == 0
    got = load_model(out)
    assert np.array_equal(got.weights, ref.weights) and got.intercept == ref.intercept  # bit for bit
    assert [json.loads(x)["pass"] for x in (out / "metrics.jsonl").read_text().splitlines()] == [1, 2]
    assert not [p.name for p in out.iterdir() if p.name.endswith(".tmp")]  # no stray temporary files
