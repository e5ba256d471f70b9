"""Adapt a trained screener to a job: its training data plus the job's answered cells.

``trainkit train WS --from EXP --out EXP2`` starts from EXP's selected weights and recipe
and fine-tunes for a few epochs on

- the job's answered cells (the acceptance samples drawn by ``trainkit sample``), split
  **by frame** into cells that train and cells that validate (checkpoint choice and, in
  ``trainkit evaluate``, the screening threshold), so no frame feeds both;
- a seeded random share of EXP's own training patches ("replay", common practice in
  continual learning against forgetting the surfaces it knew), and EXP's validation split.

The frames the job's cells came from are recorded in EXP2's ``experiment.json``
(``adaptation.frames``, with the SHA-256 of each frame file). ``trainkit sample`` leaves
those frames out of a new acceptance sample and ``trainkit verify`` refuses an estimate
made on them: recall measured on frames the model learned from would flatter it. So the
honest path is the easy one: adapt, export, scan again, sample again (other frames),
verify again.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from trainkit.core.errors import TrainkitError
from trainkit.core.experiment import Experiment
from trainkit.learning.data import PatchSet, load_patch_set

__all__ = [
    "AdaptError",
    "Adaptation",
    "ADAPT_DEFAULTS",
    "plan_adaptation",
    "adapt_recipe",
    "load_subset",
    "replay_set",
]

#: Recipe fields an adaptation run changes from the source recipe (others are kept).
#: Four epochs of the whole network from the trained weights, no head-only stage (the
#: head is trained), half an epoch of warm-up. Measured in benchmarks/job_trust.py.
ADAPT_DEFAULTS = {"epochs": 4, "head_epochs": 0, "warmup_epochs": 0.5, "early_stop_patience": 0}

#: Share of the job's frames whose cells validate rather than train.
VAL_SHARE = 0.25

#: Source training patches replayed per job training cell (at most all of them).
REPLAY_RATIO = 3


class AdaptError(TrainkitError):
    """An adaptation that cannot run; the message says what is missing."""


@dataclass
class Adaptation:
    """What an adaptation run learns from, as recorded in EXP2's ``experiment.json``.

    Attributes:
        source: the experiment folder adapted from.
        jobs: the jobs whose answered cells are used.
        cells: subset ('train' / 'val') -> patch ids of job cells.
        frames: one dict per frame the model learned from: frame path, sha256, cells and
            subset ('train', 'val', or 'earlier' for frames of the source's own adaptation).
        left_out: answered-unsure and unanswered cells of those jobs (not used).
        replay: source training patches kept per job training cell.
    """

    source: str
    jobs: list[str]
    cells: dict[str, list[int]]
    frames: list[dict] = field(default_factory=list)
    left_out: dict[str, int] = field(default_factory=dict)
    replay: int = REPLAY_RATIO

    def to_dict(self) -> dict:
        return {
            "source": self.source,
            "jobs": self.jobs,
            "cells": {k: [int(i) for i in v] for k, v in self.cells.items()},
            "frames": self.frames,
            "left_out": self.left_out,
            "replay": self.replay,
        }

    @classmethod
    def from_dict(cls, d: dict) -> Adaptation:
        return cls(
            source=d["source"],
            jobs=list(d["jobs"]),
            cells={k: [int(i) for i in v] for k, v in d["cells"].items()},
            frames=list(d.get("frames", [])),
            left_out=dict(d.get("left_out", {})),
            replay=int(d.get("replay", REPLAY_RATIO)),
        )


def plan_adaptation(
    workspace, source: str | Path, jobs: list[str] | None, *, seed: int
) -> Adaptation:
    """Choose the job cells an adaptation learns from and split them by frame.

    Args:
        workspace: the workspace holding the jobs' samples and answers.
        source: the experiment adapted from.
        jobs: job names (None: every job of the workspace with answered cells).
        seed: seeds the frame split (scikit-learn's ``GroupShuffleSplit``).

    Raises:
        AdaptError: an unknown job, or no answered cell of a crack and a clean kind.
    """
    from sklearn.model_selection import GroupShuffleSplit

    known = [j["name"] for j in workspace.jobs()]
    if jobs:
        unknown = [j for j in jobs if j not in known]
        if unknown:
            raise AdaptError(
                f"workspace {workspace.root} holds no job {unknown[0]!r}; its jobs: "
                f"{', '.join(known) or 'none'}"
            )
    names = list(jobs) if jobs else known
    cells, left_out = [], {"unsure": 0, "unanswered": 0}
    for name in names:
        for c in workspace.job_cells(name):
            if c["answered"] and c["label"] is not None:
                cells.append({**c, "sha256": c["frame_sha256"]})
            else:
                left_out["unsure" if c["answered"] else "unanswered"] += 1
    if not cells:
        raise AdaptError(
            f"no answered cell in job(s) {', '.join(names) or '(none)'} of {workspace.root}: "
            "run `trainkit sample` and `trainkit review` first"
        )
    kinds = {c["label"] == "none" for c in cells}
    if len(kinds) < 2:
        raise AdaptError(
            f"the {len(cells)} answered job cells are all "
            f"{'clean' if True in kinds else 'cracks'}: adapting needs both kinds; sample more cells"
        )
    groups = np.array([c["sha256"] for c in cells])
    ids = np.array([c["patch_id"] for c in cells])
    if len(set(groups)) >= 2:
        split = GroupShuffleSplit(n_splits=1, test_size=VAL_SHARE, random_state=seed)
        tr, va = next(split.split(ids, groups=groups))
    else:  # one frame: nothing to validate on apart from the source's validation split
        tr, va = np.arange(len(ids)), np.zeros(0, dtype=int)
    val_frames = set(groups[va])
    frames: dict[str, dict] = {}
    for c in cells:
        f = frames.setdefault(
            c["sha256"],
            {"frame": c["frame"], "sha256": c["sha256"], "cells": 0,
             "subset": "val" if c["sha256"] in val_frames else "train"},
        )  # fmt: skip
        f["cells"] += 1
    for sha, path in Experiment(source).learned_frames().items():  # a chain of adaptations
        frames.setdefault(sha, {"frame": path, "sha256": sha, "cells": 0, "subset": "earlier"})
    return Adaptation(
        source=str(Path(source).resolve()),
        jobs=names,
        cells={"train": sorted(ids[tr].tolist()), "val": sorted(ids[va].tolist())},
        frames=sorted(frames.values(), key=lambda f: f["frame"]),
        left_out=left_out,
    )


def adapt_recipe(source: str | Path, overrides: dict | None = None):
    """The recipe of an adaptation run: the source experiment's ``recipe.yaml`` with
    :data:`ADAPT_DEFAULTS` and the user's overrides (``None`` values ignored) on top.

    Raises:
        AdaptError: the source is no trained experiment, or an override changes the network.
    """
    from trainkit.learning.config import load_train_config

    folder = Experiment(source)
    if not folder.checkpoint_path.is_file() or not folder.recipe_path.is_file():
        raise AdaptError(
            f"{folder.path} is not a trained experiment (no {Experiment.CHECKPOINT} and "
            f"{folder.recipe_path.name}); pass the folder `trainkit train --out` wrote"
        )
    given = {k: v for k, v in (overrides or {}).items() if v is not None}
    fixed = [k for k in ("backbone", "weights") if k in given]
    if fixed:
        raise AdaptError(
            f"--{fixed[0]} cannot be changed when adapting: the run starts from the weights "
            f"of {folder.path}"
        )
    # the source's recipe is read and checked as any recipe file is (one-line ConfigError)
    return load_train_config(folder.recipe_path, {**ADAPT_DEFAULTS, **given})


def load_subset(
    workspace, subset: str, class_set, experiment: dict | None, *, input_px: int | None = None
) -> PatchSet:
    """A split subset plus the job cells an adaptation assigned to it (``experiment`` is the
    experiment record of a checkpoint or ``experiment.json``; None or no adaptation: the
    split subset alone)."""
    base = load_patch_set(workspace, subset, class_set, input_px=input_px)
    adaptation = (experiment or {}).get("adaptation")
    ids = (adaptation or {}).get("cells", {}).get(subset)
    if not ids:
        return base
    jobs = load_patch_set(workspace, f"job-{subset}", class_set, input_px=input_px, ids=set(ids))
    return base.concat(jobs)


def replay_set(source_train: PatchSet, job_train: PatchSet, ratio: int, seed: int) -> PatchSet:
    """The adaptation's training set: every job training cell and a seeded random share of
    the source's training patches (``ratio`` per job cell, at most all of them)."""
    keep = min(len(source_train), ratio * len(job_train))
    pick = np.sort(np.random.default_rng(seed).permutation(len(source_train))[:keep])
    return source_train.take(pick).concat(job_train)
