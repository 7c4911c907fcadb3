"""Stage checkpoints a later run can continue from.

Each stage's folder ``<job>/checkpoints/<stage>/`` holds ``best.ckpt`` (the best validation
loss so far), ``last.ckpt`` (the end of the latest epoch: ``ModelCheckpoint(save_last=True)``)
and, once the stage's fit has returned, ``stage.json`` (its epochs, best score and wall
seconds). A continuation copies a stopped run's stage folder into its own job folder
(:func:`adopt`), then

* skips a stage that holds ``stage.json``, loading its best weights;
* resumes a stage that holds ``last.ckpt`` with Lightning's ``ckpt_path`` (model,
  optimizer, scheduler, early stopping and checkpoint state, read with ``weights_only=True``:
  :class:`StageCheckpoint` writes tensors and plain values only); the training draws go on
  from the next epoch's stream, as the uninterrupted fit would have drawn them;
* trains a stage that holds neither from its start.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path
from typing import Any

from lightning.pytorch.callbacks import ModelCheckpoint

from skymoments.atomic import atomic_path, write_json

__all__ = [
    "DONE",
    "LAST",
    "PARTIAL",
    "StageCheckpoint",
    "adopt",
    "check_resumable",
    "read_record",
    "stage_state",
    "write_record",
]

STAGE_RECORD = "stage.json"
LAST = "last.ckpt"
DONE, PARTIAL = "done", "partial"
STAGES = ("mean", "var")


def stage_state(folder: str | Path | None) -> str | None:
    """``"done"`` (the fit returned), ``"partial"`` (an epoch ended) or None (nothing)."""
    if folder is None:
        return None
    folder = Path(folder)
    if (folder / STAGE_RECORD).is_file():
        return DONE
    if (folder / LAST).is_file():
        return PARTIAL
    return None


def check_resumable(checkpoints: str | Path, what: str) -> None:
    """Refuse (ValueError) a checkpoint folder no stage can continue from.

    ``what`` names the stopped run in the message.
    """
    if stage_state(Path(checkpoints) / STAGES[0]) is None:
        raise ValueError(
            f"{what} has no checkpoint to resume from in {checkpoints} (it stopped before "
            "its first epoch ended, or was trained before runs kept last.ckpt); start it "
            "again without train.resume"
        )


def adopt(source: str | Path | None, folder: str | Path) -> str | None:
    """Copy a stopped run's stage folder ``source`` into ``folder``; return its state.

    Nothing is copied (and None returned) when ``source`` holds nothing to continue from.
    """
    state = stage_state(source)
    if state is None:
        return None
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    for path in Path(source).iterdir():
        if path.is_file() and path.suffix in (".ckpt", ".json") and path.name[0] != ".":
            # Atomic per file: DDP ranks of the same job may copy the same files at once.
            with atomic_path(folder / path.name) as tmp:
                shutil.copy2(path, tmp)
    return state


# The counts of a stage's DataWaitTimer (skymoments.moments.perf) kept in stage.json.
TIMER_FIELDS = (
    "wait_s",
    "step_s",
    "first_wait_s",
    "first_step_s",
    "samples",
    "batches",
    "steady_batches",
    "floor_s",
)


def write_record(folder: str | Path, epochs: int, best_score: float, wall_s: float, timer) -> None:
    """Write ``stage.json``: the stage's fit returned, with its epochs, best validation loss,
    wall seconds and timer counts (so a continuation reports the stage's figures)."""
    record = {
        "epochs": int(epochs),
        "best_score": float(best_score),
        "wall_s": float(wall_s),
        "timer": {name: getattr(timer, name) for name in TIMER_FIELDS},
    }
    write_json(Path(folder) / STAGE_RECORD, record)


def read_record(folder: str | Path) -> dict[str, Any]:
    return json.loads((Path(folder) / STAGE_RECORD).read_text())


class StageCheckpoint(ModelCheckpoint):
    """``ModelCheckpoint`` whose files load with ``torch.load(weights_only=True)`` and that
    keeps its best score when its folder was copied elsewhere.

    The modules' saved hyperparameters (the optimizer and scheduler as Hydra partials, not
    tensors) are left out of every checkpoint: nothing reads them back, and without them a
    checkpoint holds tensors and plain values only, so reading one runs no code. Lightning
    restores the best score, the last and the top-k paths only when the
    checkpoint's ``dirpath`` is the callback's own; a continuation trains in its own job
    folder, holding copies of the stopped run's files, so the paths are moved to it first.
    Without this the first resumed epoch would replace the best checkpoint whatever its loss.
    """

    def on_save_checkpoint(self, trainer, pl_module, checkpoint: dict[str, Any]) -> None:
        checkpoint.pop("hyper_parameters", None)
        checkpoint.pop("hparams_name", None)
        super().on_save_checkpoint(trainer, pl_module, checkpoint)

    def load_state_dict(self, state_dict: dict[str, Any]) -> None:
        old = state_dict.get("dirpath")
        new = self.dirpath
        if old and new and old != new:

            def moved(path: Any) -> Any:
                if isinstance(path, str) and path and Path(path).parent == Path(old):
                    return str(Path(new) / Path(path).name)
                return path

            state_dict = dict(state_dict)
            state_dict["dirpath"] = new
            for key in ("best_model_path", "kth_best_model_path", "last_model_path"):
                if key in state_dict:
                    state_dict[key] = moved(state_dict[key])
            if isinstance(state_dict.get("best_k_models"), dict):
                state_dict["best_k_models"] = {
                    moved(k): v for k, v in state_dict["best_k_models"].items()
                }
        super().load_state_dict(state_dict)


def stage_folder(checkpoints: str | Path | None, stage: str) -> Path | None:
    """A stopped run's folder of ``stage`` under its ``checkpoints`` folder (None: none)."""
    return None if checkpoints is None else Path(checkpoints) / stage


def finished_stage(module, folder: str | Path) -> dict[str, Any]:
    """What ``_fit_stage`` returns, for a stage a stopped run finished: its best weights are
    loaded into ``module``, and its epochs, best score, wall time and timer counts are the
    ones the stopped run recorded (this run trains nothing in it)."""
    import torch

    from skymoments.moments.perf import DataWaitTimer

    folder = Path(folder)
    record = read_record(folder)
    best = folder / "best.ckpt"
    if best.is_file():
        state = torch.load(best, map_location="cpu", weights_only=True)["state_dict"]
        module.load_state_dict(state)
    timer = DataWaitTimer()
    for name, value in record.get("timer", {}).items():
        if name in TIMER_FIELDS:
            setattr(timer, name, value)
    return {
        "timer": timer,
        "wall": float(record["wall_s"]),
        "epochs": int(record["epochs"]),
        "best_path": str(best) if best.is_file() else "",
        "best_score": float(record["best_score"]),
    }
