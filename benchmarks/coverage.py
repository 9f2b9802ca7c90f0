"""Conversion coverage: which torchvision and timm backbones orbify converts, and how exactly.

Every torchvision classification and segmentation model except the transformer families (``vit_*``,
``swin_*``, ``maxvit_*``) and one model of every timm family is built with random weights (torchvision
``weights=None`` and ``weights_backbone=None``, timm ``pretrained=False``: nothing is downloaded), through
the SOURCE forms a user types (``torchvision:NAME``, ``timm:NAME``). Each model is converted under c4 and
d4 (``channels`` budget, channel matching on; ``head="map"`` for segmentation) at a safe input size near
its usual one, and the converted model is measured:

* **input size**: the size the model is usually run at (torchvision: its weights' crop size, or resize
  size for segmentation; timm: its ``pretrained_cfg`` input size). Where one image there costs more than
  ``--max-gmacs`` multiply-accumulates (counted by ``torch.utils.flop_counter`` on the meta device), the
  side is shrunk by the square root of the excess, and the row says so. The model is then converted at the
  safe size nearest that side (``orbify.graph.sizes.SizeChecker.safe_sizes``), or, when none is, at that side
  itself, and the row gives the reason ``orbify.graph.sizes.choose_input_size`` states — unless the reason
  is a stride conflict (ops that need sides of opposite parity) that ``--repair-strides`` resolves: then the model is
  converted with ``repair_strides=True`` at the safe side of the repaired model nearest that side, and an exact row
  says "after --repair-strides" with the number of ops replaced and the drift the repair caused before tuning;
* **error**: the model's random weights are drawn with torch's seed 0, the converted model's batch-norm statistics
  are first estimated on 32 random images (``orbify.recalibrate_batch_norm``; with random weights and the initial
  statistics many outputs are constant, which every rotation keeps; with 4 images, the variance of a late stage's
  1×1 map was so poorly estimated in efficientnet_v2_l that float64 rounding grew to 8e-6 at the output, against
  1e-14 with 32), then, in float64 on two random images, the invariance error
  ``max_g ‖F(g·x) − F(x)‖ / ‖F(x)‖`` (segmentation: the equivariance error ``max_g ‖F(g·x) − g·F(x)‖ /
  ‖F(x)‖`` of the ``out`` map), with ``g`` moved by ``torch.rot90`` and ``torch.flip``. A row is *exact* at
  ≤ 1e-5. An output that differs between the two images by under 1e-6 (relative) cannot show an error, and
  the row fails instead. A row that is not exact says why: no safe input size (orbify's reason), or the first
  layer whose own equivariance error (``orbify.check_model``, float64) is over the tolerance;
* **refusals**: an ``orbify.errors.OrbifyError`` during conversion; the row keeps its first sentence and
  its "Where" part (the graph node and source line; paths shortened to the package).

**timm families.** The family of a timm name is its first ``_``-separated word cut at the first digit
(``resnet18d`` → ``resnet``), except that a number after a trailing ``v`` is a version and stays
(``mobilenetv3``, ``convnextv2``), a single digit followed by two or more letters stays (``cs3darknet``,
``res2net``), and a leading word from ``TIMM_TAGS`` that marks a variant of another family joins the next
word (``tf_efficientnet``, ``nf_regnet``, ``legacy_seresnet``). Each family is represented by its smallest
member by parameter count (built on the meta device; ties: alphabetical). What a family is was decided by
reading the module classes of that member (timm 1.0.31): ``TIMM_TRANSFORMERS`` (attention in every block
after a patch embedding) and ``TIMM_TOKEN_MIXERS`` (MLPs or LSTMs across patch tokens) are left out, as are
timm's miniature test models (``test_*``); ``TIMM_HYBRIDS`` (convolution stages or blocks with
self-attention blocks) are converted and reported apart; ``TIMM_CNNS`` are the CNN families whose share
the summary gives. A family in none of these lists (a newer timm) is converted and reported as
"unclassified" until it is added to one.

**Isolation.** Each model is measured in its own process, forked from this one (which builds models on the
meta device only), with ``--threads`` torch threads, ``--jobs`` at a time. A process is killed after
``--timeout`` seconds and may allocate ``--memory-gib`` beyond what it starts with (``RLIMIT_AS``), so one
huge or hanging model fails its own rows only. Rows are sent as they are measured: a timeout under d4 keeps
the c4 row.

Run: ``python benchmarks/coverage.py [--force]`` (the full table into docs/coverage.md; hours on 2 cores),
``--only PATTERNS`` for a part (``--only 'resnet*,timm:convnext_atto'``), ``--quick`` for a smoke run of
three models at small sizes (under a minute).
"""

from __future__ import annotations

import fnmatch  # noqa: E402
import math  # noqa: E402
import multiprocessing  # noqa: E402
import re  # noqa: E402
import resource  # noqa: E402
import shlex  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from collections import defaultdict  # noqa: E402
from collections.abc import Iterator  # noqa: E402
from dataclasses import dataclass, field, fields  # noqa: E402
from multiprocessing.connection import wait  # noqa: E402
from pathlib import Path  # noqa: E402

import torch  # noqa: E402
import torchvision  # noqa: E402
import typer  # noqa: E402
from torch import nn  # noqa: E402

import harness  # first: it sets the OpenMP wait policy before torch loads
from orbify import check_model, convert, parse_group, recalibrate_batch_norm
from orbify.common.safe_io import atomic_write
from orbify.errors import OrbifyError, OutputError
from orbify.files.sources import load_source
from orbify.graph.sizes import SizeChecker, choose_input_size
from orbify.graph.stride_repair import REPAIR_NOTE, repaired_model
from orbify.verification.measure import count_macs, count_params
from orbify.verification.segmentation import dense_output

TOLERANCE = 1e-5
"""A row is exact when its float64 invariance (or equivariance) error is at most this."""
RECALIBRATION_BATCH, RECALIBRATION_BATCHES = 8, 4
"""Random images that estimate the converted model's batch-norm statistics: batches of 8, 4 of them."""
CONSTANT_OUTPUT = 1e-6
"""Below this relative difference between the outputs of two images, an output is constant."""
DEFAULT_OUT = Path(__file__).resolve().parent.parent / "docs" / "coverage.md"
QUICK = ("torchvision:shufflenet_v2_x0_5", "torchvision:lraspp_mobilenet_v3_large", "timm:resnet10t")
QUICK_NEAR = 33
THREADS = 1
"""Torch threads per process by default (``--jobs`` gives parallelism): on the shared 2-core development machine
(load 4–5) one thread measured convnext_tiny in 36 s and resnet50 in 19 s, two threads in 210 s and 44 s."""
SMALLEST_SIDE = 33
"""No input is shrunk below this side to meet the MAC budget."""
TORCHVISION_LEFT_OUT = ("vit_", "swin_", "maxvit_")

#: Leading words of timm names that mark a variant of the family named next (ports, normaliser-free,
#: attention add-ons, old definitions), and timm's test miniatures.
TIMM_TAGS = frozenset({"tf", "dm", "nf", "eca", "ese", "gc", "legacy", "wide", "inception", "lambda", "tiny", "test"})

#: Left out: attention in every block after a patch embedding (the classes found in the smallest member).
TIMM_TRANSFORMERS = {
    "aimv2": "VisionTransformer, Attention", "beit": "VisionTransformer, Attention", "beitv2": "Attention",
    "cait": "TalkingHeadAttn, ClassAttn", "coat": "FactorAttnConvRelPosEnc", "convit": "MHSA (gated positional)",
    "crossvit": "CrossAttention", "davit": "WindowAttention, ChannelAttention", "deepseek": "AttentionRope",
    "deit": "VisionTransformer, Attention", "eva": "EvaAttention", "flexivit": "VisionTransformer, Attention",
    "gcvit": "WindowAttentionGlobal", "gemma": "Gemma4Attention", "hiera": "MaskUnitAttention",
    "hieradet": "MultiScaleAttention", "levit": "Attention, AttentionDownsample",
    "mvitv2": "MultiScaleAttention", "naflexvit": "Attention", "nest": "TransformerLayer, Attention",
    "pit": "PoolingVisionTransformer", "pvt": "PyramidVisionTransformerV2", "qwen": "AttentionRope",
    "sam": "MultiScaleAttention (Hiera)", "samvit": "VisionTransformerSAM", "swin": "WindowAttention",
    "swinv2": "WindowAttention", "tnt": "Attention (pixel and patch)",
    "twins": "LocallyGroupedAttn, GlobalSubSampleAttn", "vit": "Attention", "volo": "OutlookAttention, Attention",
    "xcit": "cross-covariance attention, ClassAttn",
}
#: Left out: MLPs or recurrent layers across patch tokens.
TIMM_TOKEN_MIXERS = {
    "mixer": "MixerBlock", "gmixer": "MixerBlock, GluMlp", "gmlp": "GatedMlp across tokens",
    "resmlp": "MLP across patches", "sequencer": "LSTM2d over rows and columns",
}
#: Converted, reported apart from the CNNs: convolutions with self-attention (or state-space) blocks.
TIMM_HYBRIDS = {
    "bat": "BatNonLocalAttn", "botnet": "BottleneckAttn", "caformer": "Attention in the last stages",
    "coatnet": "Attention2d", "coatnext": "Attention2d", "cpubone": "ConvAttention (softmax attention)",
    "csatv2": "SpatialAttention, Attention", "eca_botnext": "BottleneckAttn", "eca_halonext": "HaloAttn",
    "edgenext": "CrossCovarianceAttn", "efficientformer": "Attention in the last stage",
    "efficientformerv2": "Attention2d", "efficientvim": "HSMSSD state-space mixer",
    "efficientvit": "CascadedGroupAttention", "halo2botnet": "HaloAttn, BottleneckAttn", "halonet": "HaloAttn",
    "haloregnetz": "HaloAttn", "iformer": "SHMA single-head attention", "lambda_resnet": "LambdaLayer",
    "lamhalobotnet": "LambdaLayer, HaloAttn", "lowformer": "ConvAttention (softmax attention)",
    "maxvit": "PartitionAttentionCl", "maxxvit": "PartitionAttentionCl", "maxxvitv2": "PartitionAttentionCl",
    "mobilenetv5": "MultiQueryAttention2d", "mobilevit": "Attention", "mobilevitv2": "LinearSelfAttention",
    "nextvit": "EfficientAttention", "sebotnet": "BottleneckAttn", "sehalonet": "HaloAttn",
    "shvit": "SHSA single-head attention", "swiftformer": "EfficientAdditiveAttention",
    "tiny_vit": "Attention after an MBConv stage", "visformer": "Attention in the last stages",
    "vitamin": "Attention after MBConv stages",
}
#: Checked the same way: convolutions (with channel attention, norms and MLPs per pixel) only.
TIMM_CNNS = frozenset("""
convformer convmixer convnext convnextv2 cs3darknet cs3edgenet cs3se cs3sedarknet cspdarknet cspnext cspresnet
cspresnext darknet darknetaa densenet densenetblur dla dm_nfnet dpn eca_nfnet eca_resnet eca_resnext eca_vovnet
ecaresnet ecaresnetlight ecaresnext efficientnet efficientnetv2 ese_vovnet fasternet fastvit fbnetc fbnetv3
focalnet gc_efficientnetv2 gcresnet gcresnext gernet ghostnet ghostnetv2 ghostnetv3 hardcorenas hgnet hgnetv2
hrnet inception_next inception_resnet inception_v3 inception_v4 lcnet lcnetv2 legacy_senet legacy_seresnet
legacy_seresnext legacy_xception mambaout mixnet mnasnet mobilenet mobilenetv1 mobilenetv2 mobilenetv3
mobilenetv4 mobileone nasnetalarge nf_ecaresnet nf_regnet nf_resnet nf_seresnet nfnet pnasnet5large poolformer
poolformerv2 rdnet regnetv regnetx regnety regnetz repghostnet repvgg repvit res2net res2next resnest resnet
resnetaa resnetblur resnetrs resnetv2 resnext rexnet rexnetr sedarknet selecsls semnasnet senet seresnet
seresnetaa seresnext seresnextaa skresnet skresnext spnasnet starnet tf_efficientnet tf_efficientnetv2 tf_mixnet
tf_mobilenetv3 tinynet tresnet vgg vovnet wide_resnet xception
""".split())
OUTCOMES = ("exact", "not exact", "refused", "failed")


@dataclass(frozen=True)
class ModelSpec:
    """One model of the table: where it comes from, its set (task or kind) and its timm family."""

    source: str            # "torchvision" or "timm"
    name: str
    set: str               # classification, segmentation (torchvision); CNN, hybrid, unclassified (timm)
    family: str = ""

    @property
    def reference(self) -> str:
        return f"{self.source}:{self.name}"

    @property
    def dense(self) -> bool:
        return self.set == "segmentation"


@dataclass(frozen=True)
class Settings:
    """How every model is measured (the command-line options)."""

    groups: tuple[str, ...]
    near: int | None       # every model near this side (--quick), else near its usual side
    max_gmacs: float
    timeout: float
    memory_gib: float
    jobs: int
    threads: int


@dataclass
class Row:
    """One model under one group; ``outcome`` is one of OUTCOMES, ``detail`` the refusal or failure or its cause."""

    spec: ModelSpec
    group: str
    size: str = ""
    params_before: int | None = None
    params_after: int | None = None
    error: float | None = None
    convert_s: float | None = None
    row_s: float | None = None
    outcome: str = "failed"
    detail: str = ""


@dataclass(frozen=True)
class FamilyNote:
    """A timm family: its members, its representative and why, or why it is left out."""

    family: str
    members: int
    kind: str
    representative: str = ""
    why: str = ""


# -- what to convert -------------------------------------------------------------------------------------------
def matches(patterns: list[str], *names: str) -> bool:
    return any(fnmatch.fnmatchcase(name, pattern) for pattern in patterns for name in names)


def torchvision_specs(patterns: list[str] | None) -> list[ModelSpec]:
    """torchvision's classification and segmentation models but the transformer families, optionally filtered."""
    sets = {"classification": torchvision.models, "segmentation": torchvision.models.segmentation}
    specs = [ModelSpec("torchvision", name, kind) for kind, module in sets.items()
             for name in torchvision.models.list_models(module=module) if not name.startswith(TORCHVISION_LEFT_OUT)]
    if patterns is None:
        return specs
    return [spec for spec in specs if matches(patterns, spec.name, spec.reference)]


def timm_family(name: str) -> str:
    """The family of a timm model name (the rule of the module docstring): ``resnet50d`` → ``resnet``."""
    words = name.split("_")
    tags = []
    while len(words) > 1 and words[0] in TIMM_TAGS:
        tags.append(words.pop(0))
    runs = re.findall(r"[a-z]+|\d+", words[0])
    stem = runs[0]
    for number, letters in zip(runs[1::2], [*runs[2::2], ""]):
        if stem.endswith("v"):                          # a version: mobilenetv3, convnextv2
            stem += number
            break
        if len(number) == 1 and len(letters) >= 2:      # a digit inside the name: cs3darknet, res2net
            stem += number + letters
        else:
            break
    return "_".join([*tags, stem])


def timm_kind(family: str) -> str:
    """'transformer', 'token mixer', 'test', 'hybrid', 'CNN' or 'unclassified' (see the module docstring)."""
    if family in TIMM_TRANSFORMERS:
        return "transformer"
    if family in TIMM_TOKEN_MIXERS:
        return "token mixer"
    if family.startswith("test_"):
        return "test"
    return "hybrid" if family in TIMM_HYBRIDS else "CNN" if family in TIMM_CNNS else "unclassified"


def parameter_count(name: str) -> float:
    """Parameters of timm ``name`` built on the meta device (nothing allocated or read); inf if it cannot be built."""
    import timm

    try:
        with torch.device("meta"):
            model = timm.create_model(name, pretrained=False)
    except Exception:   # a registered name that does not build: never the representative
        return math.inf
    return sum(parameter.numel() for parameter in model.parameters())


def timm_specs(patterns: list[str] | None) -> tuple[list[ModelSpec], list[FamilyNote]]:
    """One model per timm family (its smallest member), or those that ``patterns`` name; and the family notes.

    A bare pattern matches family names; ``timm:PATTERN`` matches model names, each of which is then
    converted itself instead of its family's representative."""
    import timm

    families: dict[str, list[str]] = defaultdict(list)
    for name in timm.list_models():
        families[timm_family(name)].append(name)
    named = [p.removeprefix("timm:") for p in patterns or [] if p.startswith("timm:")]
    specs, notes = [], []
    for family, members in sorted(families.items()):
        kind = timm_kind(family)
        if kind in ("transformer", "token mixer", "test"):
            notes.append(FamilyNote(family, len(members), kind, why=_left_out_reason(family, kind)))
            continue
        chosen = [(name, "named on the command line") for name in members if matches(named, name)]
        if not chosen and (patterns is None or matches([p for p in patterns if ":" not in p], family)):
            counts = {name: parameter_count(name) for name in members}
            smallest = min(members, key=lambda name: (counts[name], name))
            chosen = [(smallest, f"smallest of {len(members)} ({counts[smallest] / 1e6:.1f} M parameters)")]
        for name, why in chosen:
            specs.append(ModelSpec("timm", name, kind, family))
            shown = f"hybrid: {TIMM_HYBRIDS[family]}" if kind == "hybrid" else kind
            notes.append(FamilyNote(family, len(members), shown, name, why))
    return specs, notes


def _left_out_reason(family: str, kind: str) -> str:
    if kind == "test":
        return "timm's miniature test model of another family"
    found = TIMM_TRANSFORMERS.get(family) or TIMM_TOKEN_MIXERS[family]
    return f"{kind}: {found}"


# -- measuring one model (in its own process) -----------------------------------------------------------------
@dataclass(frozen=True)
class SizeChoice:
    """The input side of one model and, in words, why it is not the usual one or not safe."""

    side: int
    note: str         # why the side is not the usual one, or empty
    unsafe: str       # orbify's reason when no safe side was found, or empty
    repairs: int = 0  # stride repairs that make the side exact (the conversion then repairs them too)


def usual_side(model: nn.Module, spec: ModelSpec) -> int:
    """The side the model is usually run at: torchvision's weights transforms, timm's pretrained_cfg; else 224."""
    if spec.source == "timm":
        return int(getattr(model, "pretrained_cfg", {}).get("input_size", (3, 224, 224))[-1])
    keywords = torchvision.models.get_model_weights(spec.name).DEFAULT.transforms.keywords
    side = keywords.get("crop_size", keywords.get("resize_size", 224))
    return int(side[0] if isinstance(side, (list, tuple)) else side)


def choose_side(model: nn.Module, spec: ModelSpec, settings: Settings) -> SizeChoice:
    """The input side for this model: safe and near the usual (or --quick) side, shrunk to the MAC budget."""
    usual = usual_side(model, spec)
    checker = SizeChecker(model)
    target, note = usual, ""
    if settings.near is not None:
        target, note = settings.near, f"--quick: near {settings.near}"
    else:
        try:
            gmacs = count_macs(checker.gm, torch.empty(1, checker.channels, usual, usual, device="meta",
                                                       dtype=checker.dtype)) / 1e9
        except Exception:   # the model does not run at its usual side: the size search below says so
            gmacs = 0.0
        if gmacs > settings.max_gmacs:
            target = max(SMALLEST_SIDE, round(usual * math.sqrt(settings.max_gmacs / gmacs)))
            note = f"{gmacs:.0f} GMACs at the usual {usual}, over --max-gmacs {settings.max_gmacs:g}: near {target}"
    nearest = checker.safe_sizes(target, 1)
    if nearest:
        return SizeChoice(nearest[0], note or (f"usual {usual}" if nearest[0] != usual else ""), "")
    why = "the side asked for"
    reason = choose_input_size(model, (target, why)).reason.removeprefix(why).lstrip(";, ")
    first, *more = reason.split(" | ")   # orbify lists one conflict per part; the first says what it is
    unsafe = first + (f" (and {len(more)} more like it)" if more else "")
    return repaired_choice(model, checker.channels, target, note, usual) or SizeChoice(target, note, unsafe)


def repaired_choice(model: nn.Module, channels: int, target: int, note: str, usual: int) -> SizeChoice | None:
    """Where no side is exact because ops need sides of opposite parity: the safe side near ``target`` of the model
    with its stride conflicts repaired (what ``--repair-strides`` does), or None when the repair cannot make one."""
    try:
        repaired, repairs = repaired_model(model, channels, target)
        nearest = SizeChecker(repaired, channels).safe_sizes(target, 1)
    except OrbifyError:
        return None
    if not repairs or not nearest:
        return None
    return SizeChoice(nearest[0], note or (f"usual {usual}" if nearest[0] != usual else ""), "", len(repairs))


@torch.no_grad()
def error_and_spread(converted: nn.Module, group_name: str, side: int, dense: bool) -> tuple[float, float]:
    """(float64 invariance or equivariance error, relative difference of the outputs of two images), after
    the converted model's batch-norm statistics are estimated on random images."""
    group = parse_group(group_name)
    generator = torch.Generator().manual_seed(0)
    recalibrate_batch_norm(converted, [torch.randn(RECALIBRATION_BATCH, 3, side, side, generator=generator)
                                       for _ in range(RECALIBRATION_BATCHES)])
    model = converted.double().eval()
    x = torch.randn(2, 3, side, side, generator=generator, dtype=torch.float64)
    y = dense_output(model(x))
    errors = []
    for element in range(1, group.order):
        moved = dense_output(model(group.act_grid(element, x)))
        expected = group.act_grid(element, y) if dense else y
        errors.append(float((moved - expected).norm() / y.norm()))
    return max(errors), float((y[0] - y[1]).norm() / y[0].norm())


def first_inexact_layer(converted: nn.Module, original: nn.Module, plan, side: int) -> str:
    """Where a converted model at a safe size loses exactness: the first layer whose own equivariance error (measured
    by ``orbify.check_model`` in float64) is over the tolerance."""
    images = torch.randn(2, 3, side, side, generator=torch.Generator().manual_seed(1))
    try:
        report = check_model(converted.float(), original, plan, images, batch_size=2)
    except Exception as error:   # the table keeps the row; the reason stays unknown
        return "orbify.check_model raised " + failure(error)
    layer = next((layer for layer in report.layers if layer.equivariance_error > TOLERANCE), None)
    if layer is None:
        return "every converted layer is exact on its own"
    return (f"the first layer over 1e-5 is '{layer.target}' ({layer.kind}, {layer.layout_in} → "
            f"{layer.layout_out}, error {layer.equivariance_error:.1e})")


def refusal(error: OrbifyError) -> str:
    """The first sentence of an orbify error and its "Where" part, file paths shortened to the package."""
    first = error.what.split(". ")[0]
    if not error.where:
        return first
    where = re.sub(r'File "[^"]*/(?:site-packages|src)/', 'File "', error.where)
    return f"{first}. Where: {where}"


def failure(error: BaseException) -> str:
    """A short line for an unexpected exception."""
    message = str(error).strip().splitlines()[0] if str(error).strip() else ""
    if _ran_out_of_memory(error):
        return f"over the memory limit (--memory-gib): {type(error).__name__}: {message[:200]}"
    return f"{type(error).__name__}: {message[:300]}"


def _ran_out_of_memory(error: BaseException) -> bool:
    memory_words = re.search(r"allocate memory|not enough memory|out of memory", str(error))
    return isinstance(error, MemoryError) or memory_words is not None


def outcome_of(error: BaseException, doing: str) -> dict:
    """The row fields for an exception: orbify's refusal, or a failure while ``doing`` (also when orbify wrapped
    memory running out: the process limit, not the model, stopped it)."""
    cause = error
    while cause is not None:
        if _ran_out_of_memory(cause):
            return {"outcome": "failed", "detail": f"{doing}: {failure(cause)}"}
        cause = cause.__cause__ or cause.__context__
    if isinstance(error, OrbifyError):
        return {"outcome": "refused", "detail": refusal(error)}
    return {"outcome": "failed", "detail": f"{doing}: {failure(error)}"}


def measure_group(model: nn.Module, spec: ModelSpec, group: str, size: SizeChoice) -> dict:
    """Convert under ``group`` and measure; the fields of a :class:`Row` (without ``spec``)."""
    started = time.perf_counter()
    row = {"group": group, "size": f"{size.side}" + (f" ({size.note})" if size.note else "")}
    try:
        converted, plan = convert(model, group, head="map" if spec.dense else "invariant",
                                  example_input=torch.zeros(1, 3, size.side, size.side),
                                  repair_strides=size.repairs > 0)
    except Exception as error:
        return {**row, **outcome_of(error, "converting"), "row_s": time.perf_counter() - started}
    row.update(convert_s=time.perf_counter() - started, params_after=count_params(converted))
    try:
        error, spread = error_and_spread(converted, group, size.side, spec.dense)
    except Exception as error:
        return {**row, "detail": f"running the converted model: {failure(error)}",
                "row_s": time.perf_counter() - started}
    row.update(error=error, row_s=time.perf_counter() - started)
    if not math.isfinite(error) or not spread >= CONSTANT_OUTPUT:
        return {**row, "detail": f"output constant or not finite (two images differ by {spread:.1e})"}
    if error <= TOLERANCE:
        return {**row, "outcome": "exact", "detail": repair_detail(plan) if size.repairs else ""}
    if size.unsafe:
        why = f"no safe input size: {size.unsafe}"
    else:
        why = first_inexact_layer(converted, model, plan, size.side)
    return {**row, "outcome": "not exact", "detail": why, "row_s": time.perf_counter() - started}


def repair_detail(plan) -> str:
    """What ``--repair-strides`` changed, from the plan's notes: how many ops, and the drift it measured."""
    replaced = sum(note.startswith(REPAIR_NOTE + ":") and "(exact on the other parity)" in note for note in plan.notes)
    drift = next((note for note in plan.notes if note.startswith(REPAIR_NOTE + " drift")), "")
    change = re.search(r"relative output change ([0-9.e+-]+)", drift)
    return (f"after --repair-strides ({replaced} ops replaced; relative output change before tuning "
            f"{float(change.group(1)):.2g})" if change else f"after --repair-strides ({replaced} ops replaced)")


def measure_model(spec: ModelSpec, settings: Settings) -> Iterator[dict]:
    """Build the model, choose its side and yield one row (a dict) per group as each is measured."""
    harness.fix_threads(settings.threads)
    torch.manual_seed(0)   # the random weights: the same in every run
    try:
        model = load_source(spec.reference).module
    except Exception as error:   # not a conversion refusal: the rows fail
        yield {"outcome": "failed", "detail": "building the model: " + failure(error)}
        return
    before = count_params(model)
    try:
        size = choose_side(model, spec, settings)
    except Exception as error:   # orbify cannot trace or run it: a refusal of every group
        yield {**outcome_of(error, "choosing the input size"), "params_before": before}
        return
    for group in settings.groups:
        yield {**measure_group(model, spec, group, size), "params_before": before}


def _limit_memory(gib: float) -> None:
    """Let this process allocate ``gib`` GiB of address space beyond what it holds now (Linux)."""
    try:
        status = Path("/proc/self/status").read_text()
    except OSError:
        return
    held = int(re.search(r"VmSize:\s+(\d+) kB", status).group(1)) * 1024
    limit = held + int(gib * 2**30)
    resource.setrlimit(resource.RLIMIT_AS, (limit, limit))


def _child(spec: ModelSpec, settings: Settings, sender) -> None:
    """The forked process: send each message of :func:`measure_model`, or the failure that stopped it."""
    warnings.simplefilter("ignore")   # builders' and tracing's warnings would interleave with the progress lines
    try:
        _limit_memory(settings.memory_gib)
        for message in measure_model(spec, settings):
            sender.send(message)
    except BaseException as error:   # the parent turns the groups not yet sent into failed rows
        sender.send({"crash": failure(error)})
    finally:
        sender.close()


# -- running the models in processes ---------------------------------------------------------------------------
@dataclass
class Job:
    """A model being measured: its process, when it started and the messages received so far."""

    spec: ModelSpec
    process: multiprocessing.Process
    started: float
    messages: list[dict] = field(default_factory=list)


def rows_of(job: Job, groups: tuple[str, ...], ended: str) -> list[Row]:
    """The rows of a finished (or killed) job; a group it did not report fails with the crash it sent, else ``ended``
    (unless the whole model was refused or failed before conversion, which every group then reports)."""
    names = {f.name for f in fields(Row)} - {"spec", "group"}
    reported, whole = {}, {}
    for message in job.messages:
        if "group" in message:
            reported[message["group"]] = message
        elif "crash" in message:
            ended = message["crash"]
        else:
            whole = message
    fallback = {"detail": ended, **whole}
    return [Row(job.spec, group, **{key: value for key, value in (reported.get(group) or fallback).items()
                                    if key in names}) for group in groups]


def start(context, spec: ModelSpec, settings: Settings) -> tuple[object, Job]:
    """Fork the process that measures ``spec``; the end of the pipe its messages arrive on, and the job."""
    receiver, sender = context.Pipe(duplex=False)
    process = context.Process(target=_child, args=(spec, settings, sender), daemon=True)
    process.start()
    sender.close()
    return receiver, Job(spec, process, time.monotonic())


def run_models(specs: list[ModelSpec], settings: Settings) -> list[Row]:
    """Measure every model in its own forked process, ``settings.jobs`` at a time; rows in the order of ``specs``."""
    context = multiprocessing.get_context("fork")
    pending, running, done = list(specs), {}, {}

    def finish(receiver, ended: str) -> None:
        job = running.pop(receiver)
        receiver.close()
        done[job.spec] = rows_of(job, settings.groups, ended)
        outcomes = ", ".join(f"{row.group} {row.outcome}" for row in done[job.spec])
        harness.progress(f"{job.spec.reference}: {outcomes} ({time.monotonic() - job.started:.0f} s)")

    def overdue(receiver) -> bool:
        """Kill the job if its time is up (a row it sends after that does not count) and say whether it was."""
        job = running[receiver]
        if time.monotonic() - job.started <= settings.timeout:
            return False
        job.process.kill()
        job.process.join()
        finish(receiver, f"timed out after {settings.timeout:g} s (--timeout)")
        return True

    while pending or running:
        while pending and len(running) < settings.jobs:
            running.update([start(context, pending.pop(0), settings)])
        first_deadline = min(job.started for job in running.values()) + settings.timeout
        for receiver in wait(list(running), timeout=min(1.0, max(0.0, first_deadline - time.monotonic()))):
            if overdue(receiver):
                continue
            try:
                running[receiver].messages.append(receiver.recv())
            except (EOFError, OSError):   # the process closed its end: it is done, or died
                process = running[receiver].process
                process.join()
                killed = ": killed, probably out of memory" if process.exitcode == -9 else ""
                finish(receiver, f"its process ended (exit code {process.exitcode}) without a result{killed}")
        for receiver in list(running):
            overdue(receiver)
    return [row for spec in specs for row in done[spec]]


# -- the report ---------------------------------------------------------------------------------------------------
def cell(value: object) -> str:
    """Text for a Markdown table cell: no '|' or line break inside."""
    return " ".join(str(value).split()).replace("|", "\\|")


def markdown_table(header: list[str], body: list[list[object]]) -> list[str]:
    lines = ["| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"]
    return lines + ["| " + " | ".join(cell(value) for value in values) + " |" for values in body]


def summary_lines(rows: list[Row], groups: tuple[str, ...]) -> list[str]:
    """Counts per source, set and group, and the share of timm CNN families converted exactly."""
    counts: dict[tuple[str, str, str], dict[str, int]] = defaultdict(lambda: dict.fromkeys(OUTCOMES, 0))
    for row in rows:
        counts[row.spec.source, row.spec.set, row.group][row.outcome] += 1
    body = [[source, kind, group, sum(tally.values()), *tally.values()]
            for (source, kind, group), tally in counts.items()]
    lines = markdown_table(["source", "set", "group", "models", "exact (≤ 1e-5)", "converted, not exact",
                            "refused", "failed"], body)
    cnn = defaultdict(list)
    for row in rows:
        if row.spec.source == "timm" and row.spec.set == "CNN":
            cnn[row.spec.family].append(row.outcome == "exact")
    if cnn:
        every = sum(all(exact) for exact in cnn.values())
        exact_per_group = {g: sum(r.outcome == "exact" for r in rows if r.spec.set == "CNN" and r.group == g)
                           for g in groups}
        per_group = ", ".join(f"under {g}: {n}" for g, n in exact_per_group.items())
        repaired = sum(row.outcome == "exact" and "--repair-strides" in row.detail for row in rows)
        lines += ["", f"**timm CNN families converted exactly under {' and '.join(groups)}: {every} of {len(cnn)} "
                      f"({100 * every / len(cnn):.0f} %)** (exact {per_group}). Exact rows after "
                      f"--repair-strides (every source and set): {repaired}."]
    return lines


def results_lines(rows: list[Row]) -> list[str]:
    def number(value: float | None, form: str) -> str:
        return "" if value is None else format(value, form)

    body = [[row.spec.name, row.spec.source, row.spec.set, row.group, row.size, number(row.params_before, ","),
             number(row.params_after, ","), number(row.error, ".1e"), number(row.convert_s, ".1f"),
             number(row.row_s, ".1f"), row.outcome + (f": {row.detail}" if row.detail else "")] for row in rows]
    return markdown_table(["model", "source", "set", "group", "input size", "parameters before", "parameters after",
                           "error (float64)", "convert s", "row s", "result"], body)


def family_lines(notes: list[FamilyNote]) -> list[str]:
    converted = [[n.family, n.members, n.kind, n.representative, n.why] for n in notes if n.representative]
    left_out = [[n.family, n.members, n.why] for n in notes if not n.representative]
    lines = []
    if converted:
        lines += ["### timm families converted", "",
                  *markdown_table(["family", "members", "set", "model", "chosen as"], converted), ""]
    if left_out:
        lines += ["### timm families left out", "", *markdown_table(["family", "members", "why"], left_out), ""]
    return lines


def document(rows: list[Row], notes: list[FamilyNote], settings: Settings, command: str) -> str:
    """The whole Markdown page: title, command, summary, settings, results and the timm families."""
    environment = {**harness.environment(), "groups": ", ".join(settings.groups), "budget": "channels, matching on",
                   "MAC budget": f"{settings.max_gmacs:g} GMACs per image (--max-gmacs)",
                   "per model": f"own process, {settings.timeout:g} s (--timeout), {settings.memory_gib:g} GiB more "
                                f"(--memory-gib), {settings.jobs} at a time (--jobs)"}
    lines = ["# Conversion coverage: torchvision and timm backbones", "",
             f"Written by `{command}`; the rules are in the docstring of benchmarks/coverage.py. Random weights "
             "(nothing downloaded); left out: torchvision's vit_*, swin_* and maxvit_*, and the timm families "
             "listed at the end.", "", "## Summary", "", *summary_lines(rows, settings.groups), "",
             "## Settings", "", *markdown_table(["setting", "value"], [[k, v] for k, v in environment.items()]), "",
             "## Results", "",
             "Error: float64 invariance error (segmentation: equivariance error) after batch-norm statistics are "
             "estimated on random images. Input size: in brackets why it is not the model's usual side. "
             "convert s: `orbify.convert` alone; row s: conversion, calibration and the measurement.", "",
             *results_lines(rows), "", *family_lines(notes)]
    return "\n".join(lines).rstrip() + "\n"


def command_line(flags: dict[str, bool], values: dict[str, object]) -> str:
    """The command that wrote the page: the flags given and every valued option (paths relative to the repository)."""
    root = DEFAULT_OUT.parent.parent
    parts = [flag for flag, given in flags.items() if given]
    for option, value in values.items():
        if isinstance(value, Path) and value.resolve().is_relative_to(root):
            value = value.resolve().relative_to(root)
        if value != "":
            parts += [option, format(value, "g") if isinstance(value, float) else str(value)]
    return shlex.join(["python", "benchmarks/coverage.py", *parts])


def refuse_existing(out: Path, force: bool) -> None:
    """Stop before any work when ``out`` cannot be written (exists without --force, or no such folder)."""
    problem = None
    if out.exists() and not force:
        problem = OutputError(f"The output file {str(out)!r} already exists",
                              fix="choose another path with --out, or pass --force to replace it")
    elif not out.parent.is_dir():
        problem = OutputError(f"The folder of {str(out)!r} does not exist", fix="create it, or choose another --out")
    if problem is not None:
        raise SystemExit(str(problem))


def main(
    quick: bool = typer.Option(False, "--quick", help=f"Smoke run: {', '.join(QUICK)} near {QUICK_NEAR} px "
                               "(instead of --only)."),
    only: str = typer.Option("", "--only", help="Comma-separated fnmatch patterns: torchvision names, timm family "
                             "names, or timm:NAME for timm models themselves."),
    timm_only: bool = typer.Option(False, "--timm-only", help="Only the timm families."),
    torchvision_only: bool = typer.Option(False, "--torchvision-only", help="Only the torchvision models."),
    jobs: int = typer.Option(1, "--jobs", min=1, help="Models measured at once, each in its own process."),
    threads: int = typer.Option(THREADS, "--threads", min=1, help="Torch threads of each process."),
    out: Path = typer.Option(DEFAULT_OUT, "--out", help="The Markdown file written (atomically)."),
    force: bool = typer.Option(False, "--force", help="Replace --out if it exists."),
    groups: str = typer.Option("c4,d4", "--groups", help="Comma-separated groups."),
    max_gmacs: float = typer.Option(10.0, "--max-gmacs", help="Shrink the input of costlier models to this."),
    timeout: float = typer.Option(1800.0, "--timeout", help="Seconds per model (all its groups)."),
    memory_gib: float = typer.Option(8.0, "--memory-gib", help="Memory a model's process may add, GiB."),
) -> None:
    """Convert every torchvision CNN and one model per timm family; write the coverage table."""
    if timm_only and torchvision_only:
        raise SystemExit("--timm-only and --torchvision-only exclude each other: give one of them.")
    refuse_existing(out, force)
    try:
        names = tuple(parse_group(g.strip()).name for g in groups.split(","))
    except OrbifyError as error:
        raise SystemExit(str(error)) from error
    patterns = list(QUICK) if quick else [p.strip() for p in only.split(",") if p.strip()] or None
    settings = Settings(names, QUICK_NEAR if quick else None, max_gmacs, timeout, memory_gib, jobs, threads)
    harness.fix_threads(threads)   # before any work: the header reports it, each forked process sets it again
    harness.progress("listing models" + ("" if torchvision_only else " (timm: counting parameters on the meta device)"))
    specs = [] if timm_only else torchvision_specs(patterns)
    timm_models, notes = ([], []) if torchvision_only else timm_specs(patterns)
    specs += timm_models
    harness.progress(f"{len(specs)} models under {', '.join(settings.groups)}")
    started = time.monotonic()
    rows = run_models(specs, settings)
    harness.progress(f"done in {time.monotonic() - started:.0f} s")
    command = command_line({"--quick": quick, "--timm-only": timm_only, "--torchvision-only": torchvision_only},
                           {"--only": only, "--groups": groups, "--max-gmacs": max_gmacs, "--timeout": timeout,
                            "--memory-gib": memory_gib, "--jobs": jobs, "--threads": threads, "--out": out})
    text = document(rows, notes, settings, command)
    print(text)
    atomic_write(out, lambda stream: stream.write(text.encode()), force=force)


if __name__ == "__main__":
    typer.run(main)
