"""The steps of tuning: batch-norm recalibration, one training epoch, and the held-out evaluation."""

from __future__ import annotations

from dataclasses import dataclass

import torch
import torch.nn.functional as F
from torch import nn
from torch.nn.parallel import DistributedDataParallel
from torch.utils.data import DistributedSampler

from orbify.common.modes import module_mode
from orbify.symmetry.groups import Group
from orbify.transfer.recalibrate import recalibrate_batch_norm
from orbify.tuning.dataset import TuningData
from orbify.tuning.display import Display
from orbify.tuning.distributed import World, fixed_batches
from orbify.tuning.options import TuneOptions
from orbify.tuning.records import Evaluation

RECALIBRATION_IMAGES = 4096
"""Batch-norm statistics are re-estimated on at most this many training images, evenly spread (every process alike)."""


def recalibrate_student(student: nn.Module, data: TuningData, world: World, batch_size: int) -> None:
    """Batch-norm statistics from at most RECALIBRATION_IMAGES evenly spread training images (alike on every process)."""
    count = min(len(data.train), RECALIBRATION_IMAGES)
    chosen = data.train[torch.linspace(0, len(data.train) - 1, count).long()]
    recalibrate_batch_norm(student, (data.images[chosen[batch]].to(world.device)
                                     for batch in fixed_batches(count, batch_size)))


@dataclass
class Training:
    """The moving parts of training: the model stepped (``DistributedDataParallel`` over several processes),
    the AdamW optimiser, the learning-rate scheduler, the sampler drawing each process's share, and steps per epoch."""

    model: nn.Module
    optimiser: torch.optim.Optimizer
    scheduler: torch.optim.lr_scheduler.LRScheduler
    sampler: DistributedSampler
    steps: int

    @classmethod
    def start(cls, student: nn.Module, options: TuneOptions, world: World, train_images: int) -> "Training":
        """Fresh training state for ``student`` (wrapped when ``world`` has several processes)."""
        model = student if world.size == 1 else DistributedDataParallel(
            student, device_ids=[world.device] if world.device.type == "cuda" else None)
        optimiser = torch.optim.AdamW(student.parameters(), lr=options.lr, weight_decay=options.weight_decay)
        sampler = DistributedSampler(range(train_images), num_replicas=world.size, rank=world.rank, shuffle=True,
                                     seed=options.seed)
        steps = len(fixed_batches(sampler.num_samples, options.batch_size))
        return cls(model, optimiser, _scheduler(optimiser, options, steps * options.epochs), sampler, steps)

    def epoch(self, epoch: int, data: TuningData, options: TuneOptions, world: World, display: Display) -> float:
        """Train one epoch (0-based ``epoch``) on this process's share; returns the mean loss over every process."""
        self.sampler.set_epoch(epoch)
        device = world.device
        mine = torch.tensor(list(self.sampler), dtype=torch.long)
        self.model.train()
        total = torch.zeros(2, dtype=torch.float64)
        for batch in fixed_batches(len(mine), options.batch_size):
            index = data.train[mine[batch]]
            log_probabilities = self.model(data.images[index].to(device)).log_softmax(-1)
            loss = F.kl_div(log_probabilities, data.teacher[index].to(device), log_target=True, reduction="batchmean")
            if data.labels is not None and options.label_weight > 0:
                loss = loss + options.label_weight * F.nll_loss(log_probabilities, data.labels[index].to(device))
            self.optimiser.zero_grad(set_to_none=True)
            loss.backward()
            self.optimiser.step()
            self.scheduler.step()
            total += torch.tensor([float(loss.detach()) * len(index), len(index)], dtype=torch.float64)
            display.step(float(loss.detach()))
        summed = world.sum(total)
        return float(summed[0] / summed[1])

    @property
    def learning_rate(self) -> float:
        """The learning rate after the last step."""
        return self.scheduler.get_last_lr()[0]


def _scheduler(optimiser: torch.optim.Optimizer, options: TuneOptions, total_steps: int):
    if options.schedule == "cosine":
        return torch.optim.lr_scheduler.CosineAnnealingLR(optimiser, T_max=total_steps)
    if options.schedule == "one-cycle":
        return torch.optim.lr_scheduler.OneCycleLR(optimiser, max_lr=options.lr, total_steps=total_steps)
    return torch.optim.lr_scheduler.ConstantLR(optimiser, factor=1.0, total_iters=0)


@torch.no_grad()
def evaluate(student: nn.Module, data: TuningData, group: Group, world: World, batch_size: int) -> Evaluation:
    """Held-out loss and accuracy (or agreement), upright and over the other group elements, summed over every process.

    ``student`` runs in eval mode; its mode is restored afterwards.
    """
    device = world.device
    sums = torch.zeros(4, dtype=torch.float64)   # loss, correct upright, correct transformed, images
    with module_mode(student, training=False):
        for batch in world.my_batches(len(data.held_out), batch_size):
            index = data.held_out[batch]
            images, targets = data.images[index].to(device), data.targets[index].to(device)
            for g in range(group.order):
                log_probabilities = student(group.act_grid(g, images)).log_softmax(-1)
                correct = float((log_probabilities.argmax(-1) == targets).sum())
                if g == 0:
                    sums[0] += float(F.kl_div(log_probabilities, data.teacher[index].to(device), log_target=True,
                                              reduction="sum"))
                    sums[1] += correct
                else:
                    sums[2] += correct
            sums[3] += len(index)
    loss, upright, transformed, count = world.sum(sums).tolist()
    others = group.order - 1
    return Evaluation(loss / count, upright / count, transformed / (count * others) if others else upright / count,
                      data.measure)
