"""A training run's model folder: its layout and the reading and writing of every file in it.

One training run owns one model folder (``MODEL_DIR``):

- ``run.json``: spec, options and fingerprint of the run (written first, so another run is refused);
  while a run works in the folder it holds an exclusive ``flock`` on the folder, released by the
  kernel when the process ends however it ends, so a live run is never disturbed by another;
- ``checkpoint.bin``: the complete state (``trainer.checkpoint``), every ``checkpoint_every`` rows
  and at each pass end;
- ``metrics.jsonl``: one line per finished pass (progressive loss, holdout metrics);
- ``progress.json``: the progressive-validation curve;
- ``model.json`` + ``model.npz``: the model (the best pass's when a holdout decides), written by
  :meth:`trainer.model.Model.save`;
- ``l2/<value>/model.json`` + ``model.npz``: after a run of several L2 strengths (:mod:`trainer.sweep`),
  each value's model, ``<value>`` written as :func:`l2_label` writes it;
- ``report.html``: the report's default place.
"""

from __future__ import annotations

import fcntl
import json
import os
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
#: The folder of a sweep's per-value models.
L2_FOLDER = "l2"
MODEL_FILES = (META_FILE, ARRAYS_FILE)


def l2_label(value: float) -> str:
    """An L2 strength as the per-pass table and the ``l2/<value>`` folders write it.

    The shortest scientific form that reads back as the same float (numpy's), e.g. ``1e-04``,
    ``3e-05``, ``1.5e-04``.

    Parameters
    ----------
    value : float
        The L2 strength.

    Returns
    -------
    str
    """
    return np.format_float_scientific(value, trim="-")


class RunFolder:
    """The model folder at a path: where each of its files lives and how it is read and written.

    Parameters
    ----------
    path : str or Path
        The model folder (it need not exist yet).
    """

    def __init__(self, path: str | Path):
        self.path = Path(path)
        self._lock_fd: int | None = None
        self._made: list[Path] = []

    @property
    def checkpoint(self) -> Path:
        """The checkpoint file's path."""
        return self.path / CHECKPOINT_FILE

    @property
    def report(self) -> Path:
        """The HTML report's default path."""
        return self.path / REPORT_FILE

    def claim(self) -> None:
        """Make the folder and take its exclusive lock.

        Remembers which folders this made (for :meth:`remove_new`), then removes the temporaries of writes
        that a kill interrupted (no live run holds the folder).

        Raises
        ------
        UserError
            For a path that is a file, a folder that cannot be made, or a folder another process is working
            in.
        """
        if self.path.exists() and not self.path.is_dir():
            raise UserError(f"{self.path}: exists and is not a folder")
        missing = [p for p in (self.path, *self.path.parents) if not p.exists()]
        try:
            self.path.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise UserError(f"{self.path}: cannot create the model folder ({exc.strerror or exc})") from None
        self._made = missing
        fd = os.open(self.path, os.O_RDONLY)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(fd)
            raise UserError(f"{self.path}: another hashcurve run is working in this folder right now; "
                            "wait for it to end or choose another --out") from None
        self._lock_fd = fd
        for folder, names in ((self.path, RUN_FILES), *((f, MODEL_FILES) for f in self._value_folders())):
            for name in names:
                for stale in folder.glob(f".{name}.*.tmp"):
                    stale.unlink(missing_ok=True)

    def release(self) -> None:
        """Give up the folder's lock (a no-op when not held)."""
        if self._lock_fd is not None:
            os.close(self._lock_fd)
            self._lock_fd = None

    def is_empty(self) -> bool:
        """Whether the folder holds no file at all.

        Returns
        -------
        bool
        """
        return not any(self.path.iterdir())

    def read_run(self) -> dict | None:
        """Read the folder's ``run.json``.

        Returns
        -------
        dict or None
            None when absent or unreadable.
        """
        try:
            run = json.loads((self.path / RUN_FILE).read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, json.JSONDecodeError):
            return None
        return run if isinstance(run, dict) else None

    def has_run_file(self) -> bool:
        """Whether ``run.json`` exists (readable or not).

        Returns
        -------
        bool
        """
        return (self.path / RUN_FILE).exists()

    def write_run(self, run: dict) -> None:
        """Write the folder's ``run.json`` (atomically).

        Parameters
        ----------
        run : dict
            The run's document: spec, data, holdout, options, phases.
        """
        write_atomic(self.path / RUN_FILE, [json.dumps(run, indent=2).encode()])

    def value_folder(self, value: float) -> Path:
        """The folder of one L2 strength's model after a sweep (``l2/<value>``).

        Parameters
        ----------
        value : float
            The L2 strength.

        Returns
        -------
        Path
        """
        return self.path / L2_FOLDER / l2_label(value)

    def _value_folders(self) -> list[Path]:
        top = self.path / L2_FOLDER
        return sorted(p for p in top.iterdir() if p.is_dir()) if top.is_dir() else []

    def clear(self) -> None:
        """Remove every file a run writes, and the ``l2`` folders left empty (other files are left alone)."""
        for name in RUN_FILES:
            (self.path / name).unlink(missing_ok=True)
        for folder in self._value_folders():
            for name in MODEL_FILES:
                (folder / name).unlink(missing_ok=True)
            _remove_if_empty(folder)
        _remove_if_empty(self.path / L2_FOLDER)

    def remove_new(self) -> None:
        """Remove the run's files and the folders :meth:`claim` made (a refused run leaves nothing)."""
        self.clear()
        for folder in self._made:
            try:
                folder.rmdir()
            except OSError:
                break

    def read_checkpoint(self) -> tuple[dict[str, np.ndarray], dict]:
        """Read the checkpoint (:func:`trainer.checkpoint.load_checkpoint`).

        Returns
        -------
        tuple of (dict of str to numpy.ndarray, dict)
            Its arrays and meta.

        Raises
        ------
        UserError
            For a missing, truncated, corrupt or foreign checkpoint (left untouched).
        """
        return load_checkpoint(self.checkpoint)

    def write_checkpoint(self, arrays: dict[str, np.ndarray], meta: dict, progress: list) -> None:
        """Write the checkpoint and the progressive-validation curve (each atomically).

        Parameters
        ----------
        arrays : dict of str to numpy.ndarray
            The checkpoint's arrays.
        meta : dict
            Its JSON-able meta.
        progress : list
            The progressive-validation curve, written to ``progress.json``.
        """
        save_checkpoint(self.checkpoint, arrays, meta)
        write_atomic(self.path / PROGRESS_FILE, [json.dumps(progress).encode()])

    def append_metrics(self, *records: dict) -> None:
        """Append a finished pass's records (one, or one per value of a sweep) to ``metrics.jsonl``.

        The file is rewritten atomically, so a kill never leaves half a line or part of a pass's records.

        Parameters
        ----------
        *records : dict
            The pass's records; non-finite values are written as null.
        """
        path = self.path / METRICS_FILE
        before = path.read_bytes() if path.exists() else b""
        lines = ((json.dumps(jsonable(r), allow_nan=False) + "\n").encode() for r in records)
        write_atomic(path, [before, *lines])

    def metrics(self) -> list[dict]:
        """Read ``metrics.jsonl``.

        Returns
        -------
        list of dict
            One record per finished pass (empty without the file).
        """
        path = self.path / METRICS_FILE
        if not path.exists():
            return []
        return [json.loads(line) for line in path.read_text().splitlines() if line.strip()]

    def keep_metrics(self, last_pass: int) -> None:
        """Drop the records of later passes from ``metrics.jsonl`` (atomically).

        Parameters
        ----------
        last_pass : int
            The last pass kept (after a resume, the passes the checkpoint counts as finished).
        """
        path = self.path / METRICS_FILE
        if not path.exists():
            return
        lines = [ln for ln in path.read_text().splitlines() if ln.strip() and json.loads(ln)["pass"] <= last_pass]
        write_atomic(path, [("\n".join(lines) + "\n" if lines else "").encode()])

    def progress(self) -> list:
        """Read the progressive-validation curve of ``progress.json``.

        Returns
        -------
        list
            Empty without the file.
        """
        path = self.path / PROGRESS_FILE
        return json.loads(path.read_text()) if path.exists() else []

    def save_model(self, model: Model) -> None:
        """Write ``model.json`` + ``model.npz`` (:meth:`trainer.model.Model.save`).

        Parameters
        ----------
        model : Model
            The model.

        Raises
        ------
        UserError
            When the folder cannot be written.
        """
        model.save(self.path)

    def load_model(self) -> Model:
        """The folder's model (:func:`trainer.model.load_model`).

        Returns
        -------
        Model

        Raises
        ------
        UserError
            For a missing, incomplete, corrupt or tampered-with model.
        """
        return load_model(self.path)


def _remove_if_empty(folder: Path) -> None:
    try:
        folder.rmdir()
    except OSError:
        pass
