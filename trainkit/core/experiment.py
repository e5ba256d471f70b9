"""The experiment folder: its file names, its readers and the migration of older names.

An :class:`Experiment` owns an experiment folder as :class:`~trainkit.store.workspace.Workspace`
owns a workspace: every module that reads or writes a file of the folder asks it for
the path. It imports nothing heavy (no torch), so ``trainkit status`` stays quick.

Layout::

    EXP/
      recipe.yaml            the resolved training recipe (was config.yaml)
      experiment.json        which workspace, split, data digest and scale the run used
      history.csv            one row per epoch, with training throughput in images per second
      resume.pt              state for resuming after an interruption (was last.pt)
      checkpoint.pt          the chosen epoch's weights, recipe and class set
      evaluation/            metrics.json, predictions.csv, report.html, plots
      model.onnx             the exported screener; model-int8.onnx when kept
      export.json            what the export measured (parity, contract, familiarity)
      jobs.json              every check of this model on a job (trainkit verify), append-only
      .jobs.lock             the lock that serialises writers of jobs.json
      model-card.md          written beside every export, and again after each job check

Migration: folders written before the rename hold ``config.yaml``, ``last.pt`` and
``evaluation/confusion_matrix.png``; :meth:`Experiment.migrate` renames them once,
and every command that opens an experiment calls it.
"""

from __future__ import annotations

import csv
import json
import os
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from trainkit.core.errors import TrainkitError

__all__ = ["Experiment", "ExperimentFileError", "LEGACY_NAMES"]

#: Old file name -> new file name, for folders written before the rename.
LEGACY_NAMES = {
    "config.yaml": "recipe.yaml",
    "last.pt": "resume.pt",
    "evaluation/confusion_matrix.png": "evaluation/confusion.png",
}


class ExperimentFileError(TrainkitError):
    """A file of the experiment folder that cannot be read (e.g. cut short by a full disk);
    the message names the file and how to get it back."""


class Experiment:
    """One experiment folder (it need not exist yet).

    Args:
        path: the folder.
    """

    RECIPE = "recipe.yaml"
    PROVENANCE = "experiment.json"
    HISTORY = "history.csv"
    RESUME = "resume.pt"
    CHECKPOINT = "checkpoint.pt"
    MODEL = "model.onnx"
    MODEL_INT8 = "model-int8.onnx"
    CARD = "model-card.md"
    EXPORT = "export.json"
    JOBS = "jobs.json"
    JOBS_LOCK = ".jobs.lock"
    EVALUATION = "evaluation"
    METRICS = "metrics.json"
    PREDICTIONS = "predictions.csv"
    REPORT = "report.html"
    DISAGREEMENTS = "disagreements.csv"

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)

    def __repr__(self) -> str:
        return f"Experiment({str(self.path)!r})"

    # ----- paths ------------------------------------------------------------------

    @property
    def recipe_path(self) -> Path:
        return self.path / self.RECIPE

    @property
    def provenance_path(self) -> Path:
        return self.path / self.PROVENANCE

    @property
    def history_path(self) -> Path:
        return self.path / self.HISTORY

    @property
    def resume_path(self) -> Path:
        return self.path / self.RESUME

    @property
    def checkpoint_path(self) -> Path:
        return self.path / self.CHECKPOINT

    @property
    def model_path(self) -> Path:
        return self.path / self.MODEL

    @property
    def int8_model_path(self) -> Path:
        return self.path / self.MODEL_INT8

    @property
    def card_path(self) -> Path:
        return self.path / self.CARD

    @property
    def export_path(self) -> Path:
        return self.path / self.EXPORT

    @property
    def jobs_path(self) -> Path:
        return self.path / self.JOBS

    @property
    def evaluation_dir(self) -> Path:
        return self.path / self.EVALUATION

    @property
    def metrics_path(self) -> Path:
        return self.evaluation_dir / self.METRICS

    @property
    def predictions_path(self) -> Path:
        return self.evaluation_dir / self.PREDICTIONS

    @property
    def report_path(self) -> Path:
        return self.evaluation_dir / self.REPORT

    # ----- state ------------------------------------------------------------------

    def is_experiment(self) -> bool:
        """True when the folder holds an experiment (its provenance or a checkpoint)."""
        return self.provenance_path.exists() or self.checkpoint_path.exists()

    def migrate(self) -> list[str]:
        """Rename files written under older names (see :data:`LEGACY_NAMES`).

        Returns:
            One line per renamed file (empty when nothing needed renaming). A legacy
            file is left alone when a file of the new name already exists.
        """
        done = []
        for old, new in LEGACY_NAMES.items():
            src, dst = self.path / old, self.path / new
            if src.exists() and not dst.exists():
                os.replace(src, dst)
                done.append(f"{old} -> {new}")
        return done

    # ----- readers ----------------------------------------------------------------

    def read_provenance(self) -> dict | None:
        """The contents of ``experiment.json``, or None before training wrote it."""
        return _read_json(self.provenance_path, "train the experiment again (trainkit train)")

    def read_metrics(self) -> dict | None:
        """The contents of ``evaluation/metrics.json``, or None before evaluation."""
        return _read_json(self.metrics_path, f"run `trainkit evaluate {self.path}` again")

    def read_export(self) -> dict | None:
        """The export summary (``export.json``), or None before export."""
        return _read_json(self.export_path, f"run `trainkit export {self.path}` again")

    def read_jobs(self) -> list[dict]:
        """The job checks recorded for this model (``jobs.json``), oldest first."""
        recover = (
            "restore it from a backup, or move it aside to start a new record (the checks it "
            "held are then no longer listed)"
        )
        return (_read_json(self.jobs_path, recover) or {}).get("jobs", [])

    def record_job(self, record: dict, *, then: Callable[[], object] | None = None) -> None:
        """Append one job check to ``jobs.json`` (atomically, under the folder's jobs lock).

        The record is append-only: a later check of the same job adds a record and never
        replaces an earlier one, so a refusal stays on file beside a later acceptance.

        Args:
            record: the check (JSON-ready).
            then: called after the write while the lock is still held (the model card is
                rewritten from ``jobs.json`` there, so that two checks at once both reach it).
        """
        from trainkit.core.fsutil import atomic_write_json

        with self.jobs_lock():
            jobs = self.read_jobs()
            atomic_write_json(self.jobs_path, {"jobs": [*jobs, record]})
            if then is not None:
                then()

    @contextmanager
    def jobs_lock(self) -> Iterator[None]:
        """Hold the folder's exclusive lock on ``jobs.json`` (an OS file lock on
        ``.jobs.lock``, released when the process ends however it ends)."""
        self.path.mkdir(parents=True, exist_ok=True)
        with open(self.path / self.JOBS_LOCK, "a+b") as fh:
            _lock(fh)
            try:
                yield
            finally:
                _unlock(fh)

    def learned_frames(self) -> dict[str, str]:
        """SHA-256 -> path of the job frames this experiment's model learned from (by
        ``trainkit train --from``, inherited along a chain of adaptations); ``{}`` when
        it never learned from a job's frames or its ``experiment.json`` is unreadable."""
        try:
            prov = self.read_provenance() or {}
        except (OSError, ValueError):
            return {}
        frames = (prov.get("adaptation") or {}).get("frames", [])
        return {f["sha256"]: f["frame"] for f in frames}

    def read_history(self) -> list[dict[str, str]]:
        """The rows of ``history.csv`` as dicts of strings (empty before training)."""
        if not self.history_path.exists():
            return []
        with self.history_path.open(newline="", encoding="utf-8") as fh:
            return list(csv.DictReader(fh))

    def status(self) -> dict[str, Any]:
        """A short summary for ``trainkit status``: which files exist and the headline figures."""
        info: dict[str, Any] = {"experiment": str(self.path)}
        for label, path in (
            (self.CHECKPOINT, self.checkpoint_path),
            (self.HISTORY, self.history_path),
            (f"{self.EVALUATION}/{self.METRICS}", self.metrics_path),
            (f"{self.EVALUATION}/{self.REPORT}", self.report_path),
            (self.MODEL, self.model_path),
        ):
            info[label] = "present" if path.exists() else "missing"
        prov = self.read_provenance()
        if prov:
            info["workspace"] = prov.get("workspace")
            info["training_patches"] = prov.get("training_patches")
            adapted = prov.get("adaptation")
            if adapted:
                info["adapted_from"] = (
                    f"{adapted['source']} with {sum(map(len, adapted['cells'].values()))} cells "
                    f"of job(s) {', '.join(adapted['jobs'])} from {len(adapted['frames'])} frames"
                )
        metrics = self.read_metrics()
        if metrics:
            s = metrics["screening"]
            ci = s["recall_interval"]
            info["screening_recall"] = f"{s['recall']:.3f} [{ci['low']:.3f}, {ci['high']:.3f}]"
            info["threshold"] = s["threshold"]
        jobs = self.read_jobs()
        if jobs:
            last = jobs[-1]
            info["jobs_checked"] = len({j.get("job") for j in jobs})
            info["job_checks"] = len(jobs)
            info["latest_job"] = f"{last['job']}: {last['summary']}"
        return info


def _lock(fh) -> None:
    """Block until this process holds an exclusive lock on the open file ``fh``."""
    if sys.platform == "win32":
        import msvcrt

        fh.seek(0)
        while True:
            try:
                msvcrt.locking(fh.fileno(), msvcrt.LK_LOCK, 1)
                return
            except OSError:  # LK_LOCK gives up after about 10 s; keep waiting
                continue
    import fcntl

    fcntl.flock(fh.fileno(), fcntl.LOCK_EX)


def _unlock(fh) -> None:
    if sys.platform == "win32":
        import msvcrt

        fh.seek(0)
        msvcrt.locking(fh.fileno(), msvcrt.LK_UNLCK, 1)
        return
    import fcntl

    fcntl.flock(fh.fileno(), fcntl.LOCK_UN)


def _read_json(path: Path, recover: str) -> dict | None:
    """The JSON object in ``path`` (None when it does not exist); a file that is not JSON
    raises :class:`ExperimentFileError` naming it and saying how to ``recover``."""
    if not path.exists():
        return None
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError as exc:
        why = f"not valid JSON from line {exc.lineno}, column {exc.colno}"
    except UnicodeDecodeError:
        why = "not UTF-8 text"
    raise ExperimentFileError(f"{path} is damaged ({why}); {recover}") from None
