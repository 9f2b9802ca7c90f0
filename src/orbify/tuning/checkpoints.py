"""Tuning checkpoints: written by rank 0 after every epoch (and every N steps), read back to resume where a run stopped.

A checkpoint holds the options, the run's fingerprint (teacher, data, split), the position (epochs
done and steps done in the next one), the student, optimiser and scheduler states, the running
loss sums of a part-done epoch, every process's random state, and the evaluations so far. It
resumes only a run with the same options and data; on the same number of processes it goes on
bitwise as an uninterrupted run would have, from an epoch's end or from the middle of one.
"""

from __future__ import annotations

from dataclasses import asdict, fields
from pathlib import Path

import torch
from torch import nn

from orbify.common.safe_io import load_torch_weights, save_torch
from orbify.errors import CheckpointError, OutputError
from orbify.tuning.distributed import World
from orbify.tuning.options import TuneOptions
from orbify.tuning.records import EpochRecord, Evaluation, TuneResult
from orbify.tuning.training import Training

CHECKPOINT_KIND = "orbify tune checkpoint"
CHECKPOINT_VERSION = 2


def checkpoint_to_resume(path: Path | None, world: World, *, resume: bool, force: bool) -> dict | None:
    """The checkpoint state to resume from, the same on every process (None for a fresh start).

    Raises :class:`OutputError` when ``path`` exists and neither ``resume`` nor ``force`` is given,
    :class:`CheckpointError` when it is not a readable tuning checkpoint of this version.
    """
    if path is None:
        return None
    found = world.from_main(path.exists() if world.is_main else None)
    if resume and found:
        state = world.from_main(_read(path) if world.is_main else None)
        if isinstance(state, CheckpointError):
            raise state
        return state
    if found and not force:
        raise OutputError(f"The checkpoint {str(path)!r} already exists",
                          fix="pass resume (--resume) to continue from it, force (--force) to start afresh "
                              "and replace it, or choose another checkpoint path")
    return None


def _read(path: Path) -> dict | CheckpointError:
    """Rank 0 reads and checks the checkpoint; an error is returned so that every process can raise it."""
    try:
        state = load_torch_weights(path, what="tuning checkpoint")
        if not isinstance(state, dict) or state.get("kind") != CHECKPOINT_KIND:
            raise CheckpointError(f"{str(path)!r} is not an orbify tuning checkpoint",
                                  fix="give the checkpoint a previous tune run wrote, or start afresh with --force")
        if state.get("version") != CHECKPOINT_VERSION:
            raise CheckpointError(f"The checkpoint {str(path)!r} has format version {state.get('version')!r}; "
                                  f"this orbify reads version {CHECKPOINT_VERSION}", fix="start afresh with --force")
        return state
    except CheckpointError as error:
        return error


def restore_checkpoint(state: dict, path: Path, student: nn.Module, training: Training, world: World,
                       result: TuneResult) -> tuple[int, int]:
    """Load a checkpoint's state into the student, the training state and ``result``; returns the epochs it had done
    and the steps done in the next epoch.

    The random state is restored only when the checkpoint was written by as many processes
    (otherwise ``result.notes`` says so). Raises :class:`CheckpointError` for other options,
    other data or weights that do not fit.
    """
    where = str(path)
    _check_same_run(state, result, where)
    try:
        student.load_state_dict(state["student"])
    except RuntimeError as error:
        raise CheckpointError(f"The checkpoint's weights do not fit the student: {str(error).splitlines()[0]}",
                              where=where, fix="resume with the converted model the run started from") from error
    training.optimiser.load_state_dict(state["optimizer"])
    training.scheduler.load_state_dict(state["scheduler"])
    training.sums = state["sums"].clone()
    rng = state["rng"]
    if state["processes"] == world.size:
        torch.set_rng_state(rng[world.rank]["cpu"])
        if world.device.type == "cuda" and "cuda" in rng[world.rank]:
            torch.cuda.set_rng_state(rng[world.rank]["cuda"], world.device)
    else:
        result.notes.append(f"resumed on {world.size} processes from a checkpoint of {state['processes']}: "
                            "training goes on, but not exactly as the interrupted run would have")
    result.before = Evaluation.restore(state["before"])
    result.history = [EpochRecord(**{**record, "held_out": Evaluation.restore(record["held_out"])})
                      for record in state["history"]]
    result.resumed_after = int(state["epoch"])
    return result.resumed_after, int(state["step"])


def _check_same_run(state: dict, result: TuneResult, where: str) -> None:
    """Refuse a checkpoint written with other options or for other data (teacher fingerprint)."""
    saved = state["options"]
    changed = [f"{f.name} {saved.get(f.name)!r} → {getattr(result.options, f.name)!r}"
               for f in fields(TuneOptions) if saved.get(f.name) != getattr(result.options, f.name)]
    if changed:
        raise CheckpointError("The checkpoint was written with other options: " + ", ".join(changed), where=where,
                              fix="resume with the same options, or start afresh with --force")
    if state["teacher_hash"] != result.teacher_hash:
        raise CheckpointError("The checkpoint was written for other images, labels or teacher outputs", where=where,
                              fix="resume with the same data, original model and view combination, "
                                  "or start afresh with --force")


def save_checkpoint(path: Path | None, student: nn.Module, training: Training, world: World,
                    result: TuneResult, step: int = 0) -> None:
    """Gather every process's random state and let rank 0 write the checkpoint atomically (nothing for no path).

    ``step`` is the number of steps done in the epoch after the last complete one (0 at an epoch's end).
    """
    if path is None:
        return
    rng = {"cpu": torch.get_rng_state()}
    if world.device.type == "cuda":
        rng["cuda"] = torch.cuda.get_rng_state(world.device)
    states = world.gather_objects(rng)
    if not world.is_main:
        return
    save_torch({
        "kind": CHECKPOINT_KIND,
        "version": CHECKPOINT_VERSION,
        "epoch": len(result.history),
        "step": step,
        "sums": training.sums.clone(),
        "options": asdict(result.options),
        "processes": world.size,
        "teacher_hash": result.teacher_hash,
        "student": student.state_dict(),
        "optimizer": training.optimiser.state_dict(),
        "scheduler": training.scheduler.state_dict(),
        "rng": states,
        "before": asdict(result.before),
        "history": [asdict(record) for record in result.history],
    }, path, force=True)
