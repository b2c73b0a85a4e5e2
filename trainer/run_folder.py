"""A training run's model folder: its layout and the reading and writing of every file in it.

One training run owns one model folder (``MODEL_DIR``):

- ``run.json``: spec, options and fingerprint of the run (written first, so another run is refused);
- ``checkpoint.bin``: the complete state (``trainer.checkpoint``), every ``checkpoint_every`` rows
  and at each pass end;
- ``metrics.jsonl``: one line per finished pass (progressive loss, holdout metrics);
- ``progress.json``: the progressive-validation curve;
- ``model.json`` + ``model.npz``: the model (the best pass's when a holdout decides), written by
  :meth:`trainer.model.Model.save`;
- ``report.html``: the report's default place.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from trainer.atomic import write_atomic
from trainer.checkpoint import load_checkpoint, save_checkpoint
from trainer.errors import UserError
from trainer.export import META_FILE
from trainer.json_values import jsonable
from trainer.model import ARRAYS_FILE, Model, load_model

RUN_FILE = "run.json"
CHECKPOINT_FILE = "checkpoint.bin"
METRICS_FILE = "metrics.jsonl"
PROGRESS_FILE = "progress.json"
REPORT_FILE = "report.html"
RUN_FILES = (RUN_FILE, CHECKPOINT_FILE, METRICS_FILE, PROGRESS_FILE, META_FILE, ARRAYS_FILE, REPORT_FILE)


class RunFolder:
    """The model folder at ``path``: where each of its files lives and how it is read and written."""

    def __init__(self, path: str | Path):
        self.path = Path(path)

    @property
    def checkpoint(self) -> Path:
        """The checkpoint file's path."""
        return self.path / CHECKPOINT_FILE

    @property
    def report(self) -> Path:
        """The HTML report's default path."""
        return self.path / REPORT_FILE

    def create(self, run: dict, *, force: bool) -> None:
        """Make the folder for a new run and write ``run`` as its ``run.json``.

        An existing non-empty folder is refused unless ``force``; even then only another run's files
        are removed. Raises UserError for a path that is a file, a non-empty folder without
        ``force``, or a folder that is not a model folder.
        """
        if self.path.exists() and not self.path.is_dir():
            raise UserError(f"{self.path}: exists and is not a folder")
        if self.path.exists() and any(self.path.iterdir()):
            if not force:
                raise UserError(f"{self.path}: folder is not empty (another run?); use --resume to continue "
                                "it or --force to replace its files")
            if not (self.path / RUN_FILE).exists():
                raise UserError(f"{self.path}: not a hashcurve model folder (no run.json); --force only "
                                "replaces a model folder, choose an empty or new --out")
            for name in RUN_FILES:
                (self.path / name).unlink(missing_ok=True)
        self.path.mkdir(parents=True, exist_ok=True)
        write_atomic(self.path / RUN_FILE, [json.dumps(run, indent=2).encode()])

    def read_checkpoint(self) -> tuple[dict[str, np.ndarray], dict]:
        """The checkpoint's arrays and meta (``trainer.checkpoint.load_checkpoint``)."""
        return load_checkpoint(self.checkpoint)

    def write_checkpoint(self, arrays: dict[str, np.ndarray], meta: dict, progress: list) -> None:
        """Write the checkpoint (atomically) and the progressive-validation curve ``progress``."""
        save_checkpoint(self.checkpoint, arrays, meta)
        write_atomic(self.path / PROGRESS_FILE, [json.dumps(progress).encode()])

    def append_metrics(self, record: dict) -> None:
        """Append one finished pass's ``record`` to ``metrics.jsonl`` (non-finite values as null)."""
        with open(self.path / METRICS_FILE, "a", encoding="utf-8") as fh:
            fh.write(json.dumps(jsonable(record), allow_nan=False) + "\n")

    def metrics(self) -> list[dict]:
        """The records of ``metrics.jsonl``, one per finished pass (empty without the file)."""
        path = self.path / METRICS_FILE
        if not path.exists():
            return []
        return [json.loads(line) for line in path.read_text().splitlines() if line.strip()]

    def keep_metrics(self, last_pass: int) -> None:
        """Drop the records of passes after ``last_pass`` (after a resume, the passes the checkpoint
        does not count as finished)."""
        path = self.path / METRICS_FILE
        if not path.exists():
            return
        lines = [ln for ln in path.read_text().splitlines() if ln.strip() and json.loads(ln)["pass"] <= last_pass]
        write_atomic(path, [("\n".join(lines) + "\n" if lines else "").encode()])

    def progress(self) -> list:
        """The progressive-validation curve of ``progress.json`` (empty without the file)."""
        path = self.path / PROGRESS_FILE
        return json.loads(path.read_text()) if path.exists() else []

    def save_model(self, model: Model) -> None:
        """Write ``model.json`` + ``model.npz`` (:meth:`trainer.model.Model.save`)."""
        model.save(self.path)

    def load_model(self) -> Model:
        """The folder's model (:func:`trainer.model.load_model`)."""
        return load_model(self.path)
