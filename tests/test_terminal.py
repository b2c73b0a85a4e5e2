"""What a person sees while training: the progress bar on a terminal (and nothing of it in a pipe),
and the mark of a pass whose holdout is not yet calibrated in the per-pass table."""

import fcntl
import os
import pty
import select
import struct
import subprocess
import sys
import termios
from pathlib import Path

from trainer.training import CALIBRATED, TrainOptions, Trainer


def test_progress_bar_on_a_terminal_and_never_in_a_pipe(small_log, tmp_path):
    # stderr is a pseudo-terminal (the standard library's pty), stdout a pipe: the bar must show the
    # rows, the rate and the running progressive loss on the terminal, and stdout must carry the
    # per-pass table only (no carriage returns, no bar). Reference: the README's promise; drawing a
    # progress bar only on a terminal is common practice for command-line tools.
    root, spec = small_log
    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 160, 0, 0))  # a terminal's size
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).parents[1]))
    proc = subprocess.Popen([sys.executable, "-m", "trainer", "train", "--spec", str(spec), "--data", str(root),
                             "--out", str(tmp_path / "m"), "--batch-rows", "50", "--epochs", "1"],
                            stdout=subprocess.PIPE, stderr=slave, env=env)
    os.close(slave)
    seen = b""
    while True:
        ready, _, _ = select.select([master], [], [], 0.2)
        if ready:
            try:
                chunk = os.read(master, 65536)
            except OSError:
                break
            if not chunk:
                break
            seen += chunk
        elif proc.poll() is not None:
            break
    os.close(master)
    out = proc.stdout.read().decode()
    assert proc.wait(60) == 0
    terminal = seen.decode(errors="replace")
    assert "pass 1/1" in terminal and "rows/s" in terminal and "progressive loss" in terminal
    assert "/2.90k" in terminal  # the row total of the small log: 700 + 700 + 800 + 700 rows
    assert "\r" not in out and "rows/s" not in out and "progressive loss" not in out
    assert out.splitlines()[0].split()[:3] == ["pass", "rows", "train"]


def test_a_pass_outside_the_calibration_band_is_marked_with_a_note(small_log, tmp_path, capsys):
    # the band is ours (CALIBRATED, common practice for a first look); a ratio of 2.36 lies outside
    root, spec_path = small_log
    from trainer.spec import load_spec
    trainer = Trainer(load_spec(spec_path), root, tmp_path / "m", TrainOptions(), quiet=True)
    rec = {"pass": 1, "rows": 3000, "progressive_loss": 0.5, "train_seconds": 1.0, "eval_seconds": 0.1,
           "holdout": {"log_loss": 0.4, "normalized_entropy": 0.9, "auc": 0.7, "calibration_ratio": 2.36,
                       "error_rate": 0.1}}
    assert not CALIBRATED[0] <= 2.36 <= CALIBRATED[1]
    marked = trainer.table_row(rec)
    rec["holdout"]["calibration_ratio"] = 1.02
    plain = trainer.table_row(rec)
    assert "2.3600!" in marked and "1.0200 " in plain and "!" not in plain
    assert len(marked) == len(plain) == len(trainer.table_header())
