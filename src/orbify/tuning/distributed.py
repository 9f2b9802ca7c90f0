"""One process or many: the process group that tuning runs in (``torch.distributed``, launched by ``torchrun``).

The same code serves a laptop and a cluster. Started plainly, a run is a world of one process
and every collective below returns its input. Started by ``torchrun`` (which sets ``RANK``,
``WORLD_SIZE``, ``LOCAL_RANK``, ``MASTER_ADDR`` and ``MASTER_PORT``), :func:`join_world` joins
the process group from those variables: NCCL with one GPU per process where CUDA exists, gloo
on CPUs otherwise. Fixed work is split by whole batches (:meth:`World.my_batches`), so the batch
a sample is computed in does not depend on how many processes run.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import torch
import torch.distributed as dist
from torch import nn

from orbify.errors import OptionError

LAUNCH_VARIABLES = ("RANK", "WORLD_SIZE", "LOCAL_RANK", "MASTER_ADDR", "MASTER_PORT")


@dataclass(frozen=True)
class World:
    """The processes of one run: this process's ``rank`` among ``size``, and the device it computes on.

    ``joined_here`` is true when :func:`join_world` started the process group (then :meth:`leave`
    ends it); a group the caller started is left running.
    """

    rank: int
    size: int
    device: torch.device
    joined_here: bool = False

    @property
    def is_main(self) -> bool:
        """True on the one process (rank 0) that writes files and shows progress."""
        return self.rank == 0

    def my_batches(self, count: int, batch_size: int) -> list[torch.Tensor]:
        """This process's share of the batches ``[0, b), [b, 2b), ...`` of ``count`` samples (round robin)."""
        return fixed_batches(count, batch_size)[self.rank::self.size]

    def sum(self, values: torch.Tensor) -> torch.Tensor:
        """``values`` summed over every process, as float64 on the CPU."""
        values = values.detach().to(torch.float64)
        if self.size == 1:
            return values.cpu()
        moved = values.to(self.device)
        dist.all_reduce(moved)
        return moved.cpu()

    def gather_objects(self, value: object) -> list[object]:
        """Every process's ``value`` (a picklable object), in rank order."""
        if self.size == 1:
            return [value]
        gathered: list[object] = [None] * self.size
        dist.all_gather_object(gathered, value)
        return gathered

    def from_main(self, value: object) -> object:
        """Rank 0's ``value``, on every process (the others may pass anything, e.g. None)."""
        if self.size == 1:
            return value
        box = [value]
        dist.broadcast_object_list(box, src=0, device=self.device)
        return box[0]

    def gather_rows(self, rows: torch.Tensor, count: int, batch_size: int) -> torch.Tensor:
        """The rows that every process computed for its :meth:`my_batches`, put back in sample order.

        ``rows`` holds this process's rows, batch after batch. Returns a (count, ...) CPU tensor,
        the same on every process.
        """
        rows = rows.detach().cpu()
        if self.size == 1:
            return rows
        shards = self.gather_objects(rows)
        batches = fixed_batches(count, batch_size)
        order = torch.cat([index for rank in range(self.size) for index in batches[rank::self.size]])
        out = torch.empty((count, *rows.shape[1:]), dtype=rows.dtype)
        out[order] = torch.cat(shards)
        return out

    def sync_buffers(self, module: nn.Module) -> None:
        """Copy rank 0's buffers (batch-norm statistics) to every process, so that the replicas are identical."""
        if self.size == 1:
            return
        with torch.no_grad():
            for buffer in module.buffers():
                moved = buffer.to(self.device)
                dist.broadcast(moved, src=0)
                buffer.copy_(moved)

    def leave(self) -> None:
        """End the process group if :func:`join_world` started it."""
        if self.joined_here and dist.is_initialized():
            dist.destroy_process_group()


def fixed_batches(count: int, batch_size: int) -> list[torch.Tensor]:
    """Indices ``[0, b), [b, 2b), ...`` of ``count`` samples; a last batch of one joins the one before it.

    (Batch norm in training mode needs at least two samples per batch.)
    """
    batches = list(torch.arange(count).split(batch_size))
    if len(batches) > 1 and len(batches[-1]) == 1:
        batches[-2:] = [torch.cat(batches[-2:])]
    return batches


def process_rank() -> int:
    """This process's rank: from the running process group, else from ``torchrun``'s ``RANK``, else 0."""
    if dist.is_available() and dist.is_initialized():
        return dist.get_rank()
    return int(os.environ.get("RANK", "0"))


def launched_by_torchrun() -> bool:
    """True when the launch variables of ``torchrun`` (``RANK`` and ``WORLD_SIZE``) are set."""
    return "RANK" in os.environ and "WORLD_SIZE" in os.environ


def join_world(distributed: bool | str = "auto", device: str | torch.device | None = None) -> World:
    """The world this process computes in.

    ``distributed``: ``"auto"`` joins the process group when one is already running or when
    ``torchrun`` launched the process, and runs alone otherwise; ``True`` requires one (raises
    :class:`OptionError` when neither holds); ``False`` always runs alone. ``device``: None picks
    ``cuda:LOCAL_RANK`` where CUDA exists, else the CPU.
    """
    if distributed not in ("auto", True, False):
        raise OptionError(f"distributed must be 'auto', True or False, got {distributed!r}",
                          where="option distributed", fix="use 'auto' (the default)")
    running = dist.is_available() and dist.is_initialized()
    launched = launched_by_torchrun()
    if distributed is False or (distributed == "auto" and not (running or launched)):
        return World(0, 1, _device(device, 0))
    if not dist.is_available():
        raise OptionError("This PyTorch build has no torch.distributed", where="option distributed",
                          fix="install a PyTorch build with distributed support, or run on one process")
    if not (running or launched):
        raise OptionError("Distributed tuning was asked for, but no process group runs and the launch variables "
                          f"({', '.join(LAUNCH_VARIABLES)}) are not set", where="option distributed",
                          fix="start the command with torchrun, e.g. torchrun --nproc_per_node=2 -m orbify.cli tune ...")
    local_rank = int(os.environ.get("LOCAL_RANK", "0"))
    chosen = _device(device, local_rank)
    if chosen.type == "cuda":
        torch.cuda.set_device(chosen)
    if not running:
        backend = "nccl" if chosen.type == "cuda" else "gloo"
        dist.init_process_group(backend=backend, init_method="env://",
                                device_id=chosen if chosen.type == "cuda" else None)
    return World(dist.get_rank(), dist.get_world_size(), chosen, joined_here=not running)


def _device(device: str | torch.device | None, local_rank: int) -> torch.device:
    if device is not None:
        return torch.device(device)
    if torch.cuda.is_available():
        return torch.device("cuda", local_rank % torch.cuda.device_count())
    return torch.device("cpu")
