"""Finer rotations: how invariant a model converted to c8 is to 45° turns, harmonic vs bilinear filter resampling.

c8 is an approximate group: its eighth turns move filters by resampling ("harmonic", the default,
or "bilinear") and cannot be exact on a pixel grid; its quarter turns stay exact. For each model
this prints, over several inputs, the invariance error of the logits

    e(g) = ‖f(g·x) − f(x)‖ / ‖f(x)‖            ("relative to the output")
    e'(g) = ‖f(g·x) − f(x)‖ / ‖f(x) − f̄‖       ("relative to the spread", f̄ the mean over the inputs)

for the plain model (for scale) and for its c8 conversions with either resampling: the mean of
e over the four odd multiples of 45°, and the largest e over the quarter turns (exact: ~1e-15 in
float64). The second scale matters because orbit averaging can leave a converted model whose
logits hardly depend on the image: then e is small for a poor reason, e' is not.

Inputs, each multiplied by the radial disk window of orbify.verification.approximate, so that turning loses no
content:
* smooth random fields (orbify.verification.approximate.SmoothPattern): sampled turned, not interpolated, so
  the input turn itself adds no error;
* photographs: scikit-learn's two sample images (``sklearn.datasets.load_sample_images``, shipped
  with the package), square crops turned at full resolution by ``scipy.ndimage.rotate`` (cubic
  spline), then blurred by an isotropic Gaussian and sampled down to the model's size; the blur
  commutes with turning, so the small views are turned almost exactly.

Models: torchvision's resnet18 with random weights (``weights=None``; batch-norm statistics set on
smooth random fields), the same resnet18 briefly trained on the bundled example's tiles (any
angle, 33 px, Adam; no trained weights can be downloaded here), and the bundled example CNN with
its shipped trained weights. Converted models use the ``channels`` budget and orbit-average
initialisation; their batch-norm statistics are re-estimated on images of the model's own kind
(smooth random fields for the random model, example tiles for the trained ones).

A second table isolates the filter resampling from the conversion: the plain model with every
spatial filter turned by 45° (the matrices of ``Group.kernel_matrices``, i.e. what slot 1 of an
``embed`` conversion computes) against the plain model on the input turned by -45°,
‖f_turned(x) − f(R(-45°)·x)‖ / ‖f(R(-45°)·x)‖.

Why the random-weight model cannot decide between the methods: its filters are white noise, which
no resampling can turn meaningfully; bilinear resampling shrinks them (energy × 0.42 for 3×3
filters against 0.77 for harmonic), which makes a random network's output change less. Trained
filters are smooth, and there the harmonic method is the better rotation (see
tests/test_resample.py and tests/test_finer_rotations.py).

Why the input size matters: every stride-2 stage of resnet18 samples a grid that a 45° turn does not
map onto itself, and at 65 px the network ends in a 3×3 map whose average pool reads only nine
positions, so that sampling error swamps the filter rotation. At 129 px (5×5 at the end) it averages
out enough for the filter rotation to show. A last table counts, per model and kind of input, on how
many inputs the harmonic conversion is the more invariant of the two (paired, input by input).

Run: ``python benchmarks/finer_rotations.py [--quick] [--size S] [--inputs N] [--train-steps N]
[--models random,trained,example] [--no-embed]``.
"""

from __future__ import annotations

import argparse
import copy
import math
import statistics

import numpy as np
import torch
import torchvision
from scipy import ndimage
from torch import nn

import harness  # noqa: F401  (sets OMP_WAIT_POLICY before torch loads)
from harness import console, fix_threads, markdown_table, print_header, progress
from orbify.conversion.converter import convert
from orbify.example import CLASS_NAMES, load_example_model, make_tiles
from orbify.layers.bake import bake_model
from orbify.symmetry.groups import Group, parse_group
from orbify.transfer.recalibrate import recalibrate_batch_norm
from orbify.verification.approximate import SmoothPattern, disk_window

ANGLES = 8   # c8: views at every multiple of 45°
MODEL_KEYS = ("random", "trained", "example")


def pattern_views(count: int, size: int, seed: int) -> torch.Tensor:
    """(count, 8, 3, size, size) float64: smooth random fields sampled at every multiple of 45°."""
    pattern = SmoothPattern(count, 3, size, seed=seed)
    return torch.stack([pattern.sample(2 * math.pi * k / ANGLES, dtype=torch.float64) for k in range(ANGLES)], 1)


def photo_views(count: int, size: int) -> torch.Tensor:
    """(count, 8, 3, size, size) float64: crops of scikit-learn's sample photographs at every multiple of 45°.

    Each crop (a square of side 360, 280 or 220 pixels at one of six places in the photo) is turned by
    scipy.ndimage.rotate (order 3) at full resolution, blurred by a Gaussian of standard deviation
    0.6·side/size pixels and sampled at the centres of a size×size grid; channels are standardised
    with the mean and standard deviation of the upright crops.
    """
    from sklearn.datasets import load_sample_images

    photos = [image.astype(np.float64) for image in load_sample_images().images]
    crops = []
    for i in range(count):
        photo = photos[i % len(photos)]
        side = (360, 280, 220)[(i // len(photos)) % 3]
        fy, fx = ((0.5, 0.5), (0.2, 0.3), (0.8, 0.7), (0.5, 0.1), (0.3, 0.9), (0.7, 0.2))[(i // 6) % 6]
        top, left = round((photo.shape[0] - side) * fy), round((photo.shape[1] - side) * fx)
        crop = photo[top:top + side, left:left + side].transpose(2, 0, 1)
        views = []
        for k in range(ANGLES):
            turned = ndimage.rotate(crop, 360 * k / ANGLES, axes=(-1, -2), reshape=False, order=3) if k else crop
            blurred = ndimage.gaussian_filter(turned, sigma=(0, 0.6 * side / size, 0.6 * side / size))
            centres = (np.arange(size) + 0.5) * side / size - 0.5
            rows, cols = np.meshgrid(centres, centres, indexing="ij")
            views.append(np.stack([ndimage.map_coordinates(channel, [rows, cols], order=1) for channel in blurred]))
        crops.append(np.stack(views))
    images = torch.from_numpy(np.stack(crops))
    upright = images[:, 0]
    mean, std = upright.mean((0, 2, 3)).view(1, 1, 3, 1, 1), upright.std((0, 2, 3)).view(1, 1, 3, 1, 1)
    return (images - mean) / std * disk_window(size, size)


def errors(model: nn.Module, views: torch.Tensor) -> dict[str, list[float]]:
    """Per input: the mean invariance error over the odd multiples of 45° (relative to the output and to
    the spread of the outputs over the inputs), and the largest over the quarter turns."""
    with torch.no_grad():
        outputs = torch.stack([model(views[:, k]) for k in range(ANGLES)], 1)   # (inputs, 8, classes)
    upright = outputs[:, 0]
    change = (outputs - upright.unsqueeze(1)).norm(dim=2)                       # (inputs, 8)
    norm = upright.norm(dim=1, keepdim=True)
    spread = (upright - upright.mean(0)).norm(dim=1, keepdim=True)
    odd, quarter = list(range(1, ANGLES, 2)), [2, 4, 6]
    return {"output": (change[:, odd] / norm).mean(1).tolist(),
            "spread": (change[:, odd] / spread).mean(1).tolist(),
            "quarter": (change[:, quarter] / norm).amax(1).tolist()}


def copy_double(model: nn.Module) -> nn.Module:
    return copy.deepcopy(model).double().eval()


def converted(plain: nn.Module, group: Group, size: int, calibration: list[torch.Tensor]) -> nn.Module:
    """The ``channels``-budget, orbit-average conversion, batch-norm statistics re-estimated, in float64."""
    model, _ = convert(plain, group, example_input=torch.zeros(1, 3, size, size))
    recalibrate_batch_norm(model.train(), calibration)
    return model.eval().double()


def embedded(plain: nn.Module, group: Group, size: int) -> nn.Module:
    """The lossless ``fields``-budget ``embed`` conversion, baked, in float32 (its weights are |G|² times larger)."""
    model, _ = convert(plain, group, budget="fields", init="embed", example_input=torch.zeros(1, 3, size, size))
    return bake_model(model).eval()


def filters_turned(model: nn.Module, group: Group, g: int) -> nn.Module:
    """A copy of a plain model with every spatial conv filter moved by element g (``Group.kernel_matrices``)."""
    turned = copy.deepcopy(model)
    with torch.no_grad():
        for conv in turned.modules():
            if isinstance(conv, nn.Conv2d) and conv.kernel_size[0] * conv.kernel_size[1] > 1:
                matrix = group.kernel_matrices(conv.kernel_size[0])[g].to(conv.weight.dtype)
                flat = conv.weight.flatten(2)
                conv.weight.copy_((flat @ matrix.T).view_as(conv.weight))
    return turned


def emulation_errors(model: nn.Module, group: Group, views: torch.Tensor) -> list[float]:
    """Per input: ‖f with filters turned by 45° (x) − f(x turned by −45°)‖ / ‖f(x turned by −45°)‖."""
    with torch.no_grad():
        emulated = filters_turned(model, group, 1)(views[:, 0])
        reference = model(views[:, ANGLES - 1])
    return ((emulated - reference).norm(dim=1) / reference.norm(dim=1)).tolist()


def trained_resnet18(steps: int, seed: int = 0) -> tuple[nn.Module, float]:
    """resnet18 trained for ``steps`` Adam steps (batch 32, lr 1e-3) on example tiles at any angle, 33 px;
    with its accuracy on 512 fresh tiles."""
    torch.manual_seed(seed)
    model = torchvision.models.resnet18(weights=None, num_classes=len(CLASS_NAMES))
    images, labels = make_tiles(max(steps, 1) * 32, split="any", size=33, seed=seed + 1)
    optimiser = torch.optim.Adam(model.parameters(), lr=1e-3)
    model.train()
    for step in range(steps):
        batch = slice(32 * step, 32 * step + 32)
        loss = nn.functional.cross_entropy(model(images[batch]), labels[batch])
        optimiser.zero_grad()
        loss.backward()
        optimiser.step()
        if step % 50 == 0:
            progress(f"training resnet18: step {step}/{steps}, loss {loss.item():.3f}")
    model.eval()
    test_images, test_labels = make_tiles(512, split="any", size=33, seed=seed + 2)
    with torch.no_grad():
        accuracy = float((model(test_images).argmax(1) == test_labels).float().mean())
    return model, accuracy


def spread_cell(values: list[float], digits: int = 3) -> str:
    if len(values) == 1:
        return f"{values[0]:.{digits}f}"
    q1, median, q3 = statistics.quantiles(values, n=4, method="inclusive")
    return f"{median:.{digits}f} ({q1:.{digits}f}–{q3:.{digits}f})"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="33-pixel inputs, 4 of each kind, 2 training steps")
    parser.add_argument("--size", type=int, default=65, help="input side (a safe size for both models)")
    parser.add_argument("--inputs", type=int, default=12, help="inputs of each kind")
    parser.add_argument("--train-steps", type=int, default=200, help="training steps of the trained resnet18")
    parser.add_argument("--models", default=",".join(MODEL_KEYS),
                        help=f"comma-separated models, of {', '.join(MODEL_KEYS)}")
    parser.add_argument("--no-embed", action="store_true", help="leave out the lossless embed conversions "
                        "(|G|² times the weights: a resnet18 needs ~6 GB at 65 px)")
    args = parser.parse_args()
    chosen = [key.strip() for key in args.models.split(",") if key.strip()]
    if not chosen or set(chosen) - set(MODEL_KEYS):
        parser.error(f"--models takes a comma-separated list of {', '.join(MODEL_KEYS)}, got {args.models!r}")
    size, count, steps = (33, 4, 2) if args.quick else (args.size, args.inputs, args.train_steps)
    fix_threads()
    print_header("Finer rotations: invariance to 45° turns under c8, harmonic vs bilinear filter resampling",
                 {"input size": size, "inputs of each kind": count, "precision": "float64",
                  "resnet18 training steps": steps,
                  "group": "c8 (approximate: eighth turns resampled; quarter turns exact)"})
    progress("drawing inputs")
    inputs = {"smooth fields (sampled turned)": pattern_views(count, size, seed=3),
              "photographs (turned at full size)": photo_views(count, size)}
    fields = [SmoothPattern(32, 3, size, seed=seed).sample() for seed in (10, 11)]
    tiles = list(make_tiles(64, split="any", size=size, seed=7)[0].split(32))
    models = {}
    if "random" in chosen:
        torch.manual_seed(0)
        random_resnet = torchvision.models.resnet18(weights=None)
        recalibrate_batch_norm(random_resnet, [SmoothPattern(32, 3, size, seed=seed).sample() for seed in (20, 21)])
        models["resnet18, random weights"] = (random_resnet.eval(), fields)
    if "trained" in chosen:
        trained, accuracy = trained_resnet18(steps)
        models[f"resnet18, trained {steps} steps (tile accuracy {accuracy:.2f})"] = (trained, tiles)
    if "example" in chosen:
        models["example CNN, trained (shipped)"] = (load_example_model(), tiles)

    invariance = markdown_table("model", "variant", "inputs", "45° error, relative to output",
                                "45° error, relative to spread", "90° error (max)")
    emulation = markdown_table("model", "inputs", "harmonic", "bilinear")
    paired = markdown_table("model", "inputs", "harmonic more invariant than bilinear (inputs)",
                            "median of harmonic − bilinear (45° error, relative to output)")
    for model_name, (plain, calibration) in models.items():
        variants = {"plain": lambda: copy_double(plain)}
        for method in ("harmonic", "bilinear"):
            group = parse_group("c8", resampling=method)
            variants[f"c8 {method}"] = lambda group=group: converted(plain, group, size, calibration)
        if not args.no_embed and not (args.quick and model_name.startswith("resnet18")):   # embedding: ~6 GB
            for method in ("harmonic", "bilinear"):
                group = parse_group("c8", resampling=method)
                variants[f"c8 {method}, embed (float32)"] = lambda group=group: embedded(plain, group, size)
        found_by = {}
        for variant, build in variants.items():
            progress(f"{model_name}: {variant}")
            model = build()
            dtype = next(model.parameters()).dtype
            for input_name, views in inputs.items():
                found = found_by[variant, input_name] = errors(model, views.to(dtype))
                invariance.add_row(model_name, variant, input_name, spread_cell(found["output"]),
                                   spread_cell(found["spread"]), f"{max(found['quarter']):.1e}")
            if variant == "plain":
                for input_name, views in inputs.items():
                    emulation.add_row(model_name, input_name, *(spread_cell(emulation_errors(
                        model, parse_group("c8", resampling=method), views)) for method in ("harmonic", "bilinear")))
            del model
        for input_name in inputs:
            harmonic, bilinear = (found_by[f"c8 {method}", input_name]["output"] for method in ("harmonic", "bilinear"))
            differences = [h - b for h, b in zip(harmonic, bilinear)]
            paired.add_row(model_name, input_name, f"{sum(d < 0 for d in differences)} of {len(differences)}",
                           f"{statistics.median(differences):+.4f}")
    console.print("\n### Invariance of the converted models\n\nMedian over the inputs (lower–upper quartile) of the "
                  "mean error over 45°, 135°, 225°, 315°; the last column is the largest error over 90°, 180°, 270° "
                  "and all inputs. 'c8 method': channels budget, orbit average, batch norm re-estimated (float64); "
                  "'embed': fields budget, lossless embedding, i.e. the original averaged over the eight views, "
                  "the eighth-turn views computed with turned filters (float32).\n")
    console.print(invariance)
    console.print("\n### Turning the filters instead of the input (plain model, 45°)\n\nMedian (quartiles) over the "
                  "inputs of ‖f_turned(x) − f(R(−45°)·x)‖ / ‖f(R(−45°)·x)‖.\n")
    console.print(emulation)
    console.print("\n### Harmonic against bilinear, input by input (channels-budget conversions)\n")
    console.print(paired)


if __name__ == "__main__":
    main()
