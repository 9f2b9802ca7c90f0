"""Recipes: every shipped recipe converts the architectures it names invariantly; malformed ones are refused.

Why not at the recipe's own input size: a recipe's size is the one users convert at (a safe size near 224
for ImageNet backbones), and converting and checking 26 random-weight backbones at ~225 pixels in float64
takes far longer than the suite may on 2 cores. So each architecture is checked in two parts that together
cover the recipe:
  (a) the recipe's input size is safe for the architecture (Recipe.check_input_size: shapes are
      propagated on the meta device, so this costs no arithmetic), and
  (b) the architecture converts end to end with all of the recipe's other settings, and its logits'
      invariance error is ≤ 1e-5 in float64 after batch-norm recalibration on random inputs, at the
      architecture's smallest safe size (SMALL_SAFE; the bundled example at its recipe's own 33 pixels).
      A map-head recipe (the segmentation models) checks equivariance instead: each output map ('out', 'aux')
      moves as the image does.
A safe size makes every strided op commute exactly with the group, at any size: convolutions and
pools are the same ops at 33 and at 225 pixels, so (a) and (b) together stand for the conversion
at the recipe's size.
"""

import re

import pytest
import torch
import torchvision
from torch import nn
from torch.nn.utils import parametrize
from typer.testing import CliRunner

from helpers import smallest_safe_size
from orbify.cli import app, main
from orbify.conversion.converter import convert
from orbify.errors import OptionError, RecipeError
from orbify.files.sources import load_source
from orbify.recipes import find_recipe_for, list_recipes, load_recipe, merge_options, read_recipe, shipped_folder
from orbify.symmetry.groups import parse_group
from orbify.symmetry.layouts import Plain
from orbify.transfer.recalibrate import recalibrate_batch_norm

TOL = 1e-5

# The smallest safe size of each architecture for part (b): the smallest side, from the minimum torchvision
# publishes for it (weights meta "min_size") up, at which every strided conv/pool satisfies the stride rule of
# tests/helpers.py ((H + 2·padding − kernel) divisible by the stride; docs/design.md §6) and sees at least
# 2 pixels. The test checks each entry with helpers.smallest_safe_size, and the invariance check below would
# fail at an unsafe size.
SMALL_SAFE = {
    "resnet18": 33, "resnet34": 33, "resnet50": 33, "resnet101": 33, "wide_resnet50_2": 33,
    "resnext50_32x4d": 33, "vgg11_bn": 32, "vgg13_bn": 32, "vgg16_bn": 32, "vgg19_bn": 32,
    "mobilenet_v2": 33, "mobilenet_v3_small": 33, "mobilenet_v3_large": 33, "densenet121": 29,
    "efficientnet_b0": 33, "efficientnet_b1": 33, "efficientnet_b2": 33, "efficientnet_b3": 33,
    "regnet_x_400mf": 33, "regnet_y_400mf": 33, "regnet_x_800mf": 33, "regnet_y_800mf": 33,
    "squeezenet1_0": 35, "squeezenet1_1": 31, "alexnet": 63,
    "fcn_resnet50": 9, "fcn_resnet101": 9, "deeplabv3_resnet50": 9, "deeplabv3_resnet101": 9,
    "deeplabv3_mobilenet_v3_large": 17, "lraspp_mobilenet_v3_large": 17,
    "convnext_tiny": 32, "convnext_small": 32, "shufflenet_v2_x0_5": 33, "shufflenet_v2_x1_0": 33,
    "shufflenet_v2_x1_5": 33, "shufflenet_v2_x2_0": 33,
}
# The bundled example, converted at its recipe's own size (33 pixels, its tiles' size).
AT_RECIPE_SIZE = {"example", "orbify.example.model:build_example_cnn"}
# The slowest cases, 4–10 s each on 2 cores (building the models and converting their large fully connected
# layers dominate).
SLOW = {"vgg11_bn", "vgg13_bn", "vgg16_bn", "vgg19_bn", "wide_resnet50_2", "alexnet", "fcn_resnet101",
        "deeplabv3_resnet101", "vit_b_16", "vit_b_32", "vit_l_16"}
# Vision transformers fix their position embeddings to the image size they are built for (torchvision's
# image_size argument, 224 by default, asserted in forward), so part (b) builds each at a 2×2 patch grid, the
# smallest grid a quarter turn moves: side = 2 × patch. The head is drawn at random (torchvision starts it at
# zero, which would make every output 0). Each keeps its widths, heads, patch and MLP but 2 of its layers (12 or
# 24; vit_l_16 whole took ~43 s in (b) on one core): every op of the deep model is in the shallow one.
VIT_GRID_SIDE = {"vit_b_16": 32, "vit_b_32": 64, "vit_l_16": 32}
VIT_LAYERS = {"vit_b_16": 2, "vit_b_32": 2, "vit_l_16": 2}
# ConvNeXt keeps its stem, widths and downsampling layers but one block per stage (3-3-9-3 or 3-3-27-3 blocks):
# every op of the deep model is in the shallow one, at a fraction of the time (convnext_small whole took ~50 s).
SHALLOW_STAGES = {"convnext_tiny", "convnext_small"}
# timm's ViT and DeiT: built by timm.create_model (pretrained=False) for a 2×2 patch grid (img_size = 2 × 16) with 2
# of their 12 blocks, their widths and heads kept, for the same reasons as torchvision's ViTs above.
TIMM_GRID_SIDE = 32
TIMM_DEPTH = 2

CASES = [(recipe.name, architecture) for recipe in list_recipes() for architecture in recipe.architectures]


def _case(recipe_name: str, architecture: str):
    marks = [pytest.mark.slow] if architecture in SLOW else []
    return pytest.param(recipe_name, architecture, marks=marks, id=f"{recipe_name}-{architecture}")


def calibrated(model, size: int, seed: int = 0):
    """Random-weight model with batch-norm statistics estimated on random inputs, so outputs are O(1).

    Tied weights are expanded once for the whole re-estimation (``parametrize.cached``): they do not change."""
    g = torch.Generator().manual_seed(seed)
    with parametrize.cached():
        recalibrate_batch_norm(model, [torch.randn(8, 3, size, size, generator=g) for _ in range(2)])
    return model.eval()


def moved(group, x):
    """x moved by every element of the group, stacked element by element: element (k, m) mirrors the width
    (torch.flip) if m, then turns by k·4/N quarter turns (torch.rot90); element 0 is the identity."""
    quarter_turns = 4 // group.rotations
    return torch.cat([torch.rot90(x.flip(-1) if mirror else x, k * quarter_turns, (-2, -1))
                      for k, mirror in group.elements])


def invariance_error(model, group, x, dtype=torch.float64, head="invariant") -> float:
    """max_g ‖f(g·x) − f(x)‖/‖f(x)‖, every view in one batch, tied weights expanded once. In float64 by
    default: random-weight backbones amplify float32 rounding to ~1e-5 relative even in the plain model,
    float64 isolates the conversion's structural error. For a map head, f(x) is moved by g as the images are
    (‖f(g·x) − g·f(x)‖/‖g·f(x)‖), and every map of a dict output counts (the largest error)."""
    model, x = model.to(dtype), x.to(dtype)
    with torch.no_grad(), parametrize.cached():
        output = model(moved(group, x))
    errors = []
    for y in output.values() if isinstance(output, dict) else [output]:
        y = y.unflatten(0, (group.order, len(x)))
        expected = moved(group, y[0]).unflatten(0, (group.order, len(x))) if head == "map" else y[:1].expand_as(y)
        errors += [float((y[a] - expected[a]).norm() / expected[a].norm()) for a in range(1, group.order)]
    return max(errors)


def vit_at(architecture: str, side: int):
    """torchvision's ``architecture`` built for ``side``-pixel images (fewer layers where VIT_LAYERS says), head drawn."""
    builder = torchvision.models.get_model_builder(architecture)
    if architecture in VIT_LAYERS:
        with torch.device("meta"):   # the full model's widths, without computing its weights
            full = builder(image_size=side)
        model = torchvision.models.VisionTransformer(side, full.patch_size, VIT_LAYERS[architecture],
                                                     full.encoder.layers[0].num_heads, full.hidden_dim, full.mlp_dim)
    else:
        model = builder(image_size=side)
    with torch.no_grad():
        model.heads.head.weight.normal_(0, 0.02)
    return model.eval()


def timm_vit_at(architecture: str, side: int) -> nn.Module:
    """timm's ViT ``architecture`` (``timm:NAME``) built for ``side``-pixel images with TIMM_DEPTH blocks."""
    timm = pytest.importorskip("timm")
    model = timm.create_model(architecture.removeprefix("timm:"), pretrained=False, img_size=side, depth=TIMM_DEPTH)
    assert model.patch_embed.patch_size == (side // 2, side // 2)
    return model.eval()


def one_block_per_stage(model: nn.Module) -> nn.Module:
    """torchvision's ConvNeXt with only the first block of each stage (``features`` alternates downsampling layers
    and stages, each stage a Sequential of CNBlock)."""
    for stage in model.features:
        if isinstance(stage, nn.Sequential) and isinstance(stage[0], torchvision.models.convnext.CNBlock):
            del stage[1:]
    return model


def test_every_shipped_architecture_has_a_small_safe_size():
    # keeps CASES honest: a new recipe must say how its architectures are checked
    torchvision_names = {a for _, a in CASES if ":" not in a and a != "example"}
    assert torchvision_names <= set(SMALL_SAFE) | set(VIT_GRID_SIDE)
    for architecture, side in VIT_GRID_SIDE.items():   # a 2×2 patch grid
        with torch.device("meta"):
            assert side == 2 * torchvision.models.get_model(architecture, image_size=side).patch_size
    assert len(list_recipes()) >= 10


@pytest.mark.parametrize("recipe_name,architecture", [_case(*case) for case in CASES])
def test_recipe_converts_its_architecture_invariantly(recipe_name, architecture):
    recipe = load_recipe(recipe_name)
    group = parse_group(recipe.group)
    assert group.exact, "shipped recipes use exact groups; an approximate one needs a disk-masked check"
    torch.manual_seed(0)
    # Architectures from torchvision's model definitions (random weights, never downloaded).
    original = load_source(dict(zip(recipe.architectures, recipe.sources))[architecture]).module.eval()
    recipe.check_input_size(original)                                       # (a)
    options = recipe.convert_options()
    size = options.pop("input_size")
    if architecture in VIT_GRID_SIDE:
        size = VIT_GRID_SIDE[architecture]
        original = vit_at(architecture, size)
    elif architecture.startswith("timm:"):
        size = TIMM_GRID_SIDE
        original = timm_vit_at(architecture, size)
    elif architecture not in AT_RECIPE_SIZE:
        size = SMALL_SAFE[architecture]
        published_minimum = torchvision.models.get_model_weights(architecture).DEFAULT.meta["min_size"][0]
        assert smallest_safe_size(original, max(2, published_minimum), size) == size, architecture
    if architecture in SHALLOW_STAGES:
        original = one_block_per_stage(original)
    x = torch.randn(2, 3, size, size)
    converted, plan = convert(original, example_input=x, **options)         # (b)
    assert (plan.group, plan.budget, plan.head, plan.init) == (recipe.group, recipe.budget, options["head"],
                                                                options["init"])
    assert plan.stop_at == options["stop_at"] and plan.match == options["match"]
    calibrated(converted, size)
    assert invariance_error(converted, group, x, head=plan.head) <= TOL
    # the plain original is not invariant, so the check above can fail (float32 is enough to see that)
    assert invariance_error(calibrated(original, size), group, x, torch.float32, plan.head) > 1e-3


def test_example_recipe_on_the_trained_example_model():
    # the shipped trained weights, at the recipe's own size, without recalibration
    recipe = load_recipe("example")
    options = recipe.convert_options()
    size = options.pop("input_size")
    model = load_source("orbify.example:load_example_model").module
    recipe.check_input_size(model)
    x = torch.rand(4, 3, size, size)
    converted, _ = convert(model, example_input=x, **options)
    assert invariance_error(converted.eval(), parse_group(recipe.group), x) <= TOL


def test_shipped_recipes_are_package_data():
    # the recipes live inside the package, so a non-editable install carries them
    folder = shipped_folder()
    assert folder.name == "recipes" and folder.parent.name == "orbify"
    assert sorted(p.stem for p in folder.glob("*.toml")) == sorted(r.name for r in list_recipes())


@pytest.mark.parametrize("architecture", ["resnet18", "torchvision:resnet50", "vgg16_bn", "mobilenet_v3_large",
                                          "densenet121", "efficientnet_b2", "regnet_y_400mf", "squeezenet1_0",
                                          "alexnet", "example", "orbify.example.model:build_example_cnn",
                                          "torchvision:resnet18?num_classes=6"])
def test_find_recipe_for_known_architectures(architecture):
    recipe = find_recipe_for(architecture)
    assert recipe is not None and recipe.applies_to(architecture)


def test_find_recipe_for_unknown_architecture_is_none():
    assert find_recipe_for("swin_t") is None   # windowed attention: refused, no recipe
    assert find_recipe_for("mypackage.models:build") is None


def test_merge_options_command_line_wins_none_keeps_recipe():
    recipe = load_recipe("resnet")
    merged = merge_options(recipe, {"group": "c4", "budget": None, "input_size": 257})
    assert merged["group"] == "c4" and merged["input_size"] == 257
    assert merged["budget"] == recipe.budget and merged["match"] == recipe.convert_options()["match"]
    assert recipe.group != "c4"   # the override really changed something
    tune = merge_options(recipe, {"epochs": 3, "lr": None}, section="tune")
    assert tune["epochs"] == 3 and tune["lr"] == recipe.tune_options()["lr"]
    with pytest.raises(OptionError, match="budjet"):
        merge_options(recipe, {"budjet": "params"})


def test_recipe_options_reach_convert_including_stop_at(tmp_path):
    # a user recipe that converts resnet18 only up to layer3 (everything after stays plain)
    path = write(tmp_path, RESNET18.replace("[recalibrate]", 'stop_at = "layer3"\n\n[recalibrate]'))
    recipe = read_recipe(path)
    options = recipe.convert_options()
    size = options.pop("input_size")
    assert size == 225
    model = load_source("torchvision:resnet18").module
    x = torch.randn(2, 3, 33, 33)
    converted, plan = convert(model, example_input=x, **options)
    assert plan.stop_at == "layer3" and plan.group == "c4" and plan.budget == "params"
    assert isinstance(plan.layer("layer4.0.conv1").layout_in, Plain)
    assert invariance_error(calibrated(converted, 33), parse_group("c4"), x) <= TOL


# -- malformed recipes ----------------------------------------------------------------------------

RESNET18 = """
[recipe]
description = "resnet18 under c4"
architectures = ["resnet18"]

[convert]
group = "c4"
input_size = 225
budget = "params"

[recalibrate]
batches = 4

[tune]
epochs = 2
"""


def write(tmp_path, text: str):
    path = tmp_path / "mine.toml"
    path.write_text(text)
    return path


def refusal(path, *, apply_to=None) -> str:
    """The message of the RecipeError that loading (and, with apply_to, applying) the recipe raises."""
    with pytest.raises(RecipeError) as info:
        recipe = load_recipe(path)
        if apply_to is not None:
            recipe.check_input_size(load_source(apply_to).module)
    return str(info.value)


def test_valid_user_recipe_loads(tmp_path):
    recipe = load_recipe(write(tmp_path, RESNET18))
    assert recipe.name == "mine" and recipe.sources == ("torchvision:resnet18",)
    assert recipe.convert_options()["budget"] == "params"
    assert recipe.tune_options()["epochs"] == 2 and recipe.recalibrate_batches == 4


@pytest.mark.parametrize("old,new,key_path,allowed", [
    ('budget = "params"', 'budjet = "params"', "convert.budjet", "group, input_size, budget, head, init, match"),
    ("[tune]", "[tuning]", "tuning", "recipe, convert, calibrate, recalibrate, tune"),
    ("input_size = 225", 'input_size = "225"', "convert.input_size", "safe"),
    ("epochs = 2", "epochs = true", "tune.epochs", "an integer ≥ 1"),
    ("epochs = 2", "epochs = 2.5", "tune.epochs", "an integer ≥ 1"),
    ("batches = 4", "batches = -1", "recalibrate.batches", "an integer ≥ 0"),
    ('budget = "params"', 'budget = "widths"', "convert.budget", "channels, params, fields"),
    ('group = "c4"', 'group = "q4"', "convert.group", "cN or dN"),
    ('budget = "params"', 'init = "embed"', "convert.init", 'budget = "fields"'),
    ('architectures = ["resnet18"]', 'architectures = ["resnet19"]', "recipe.architectures", "torchvision model names"),
    ('architectures = ["resnet18"]', 'architectures = "resnet18"', "recipe.architectures", "package.module:factory"),
    ('architectures = ["resnet18"]', "architectures = []", "recipe.architectures", "package.module:factory"),
    ('group = "c4"\n', "", "convert.group", "cN or dN"),
])
def test_malformed_recipe_names_file_key_and_allowed_values(tmp_path, old, new, key_path, allowed):
    assert old in RESNET18
    path = write(tmp_path, RESNET18.replace(old, new))
    message = refusal(path)
    assert str(path) in message
    assert f"key {key_path}" in message
    assert "allowed: " in message and allowed in message


def test_unknown_architecture_suggests_close_names(tmp_path):
    message = refusal(write(tmp_path, RESNET18.replace('["resnet18"]', '["resnet18", "resnet19"]')))
    # torchvision's model list (torchvision.models.list_models) has resnet18 and resnet101
    assert "'resnet19'" in message and "resnet18" in message.split("close:")[1]


def test_timm_architectures_are_checked_against_timms_registry(tmp_path):
    pytest.importorskip("timm")
    recipe = load_recipe(write(tmp_path, RESNET18.replace('["resnet18"]', '["timm:resnet18d"]')))
    assert recipe.sources == ("timm:resnet18d",) and recipe.applies_to("timm:resnet18d")
    # timm.list_models() has resnet18 but no resnet18q (difflib's closest name to it)
    message = refusal(write(tmp_path, RESNET18.replace('["resnet18"]', '["timm:resnet18q"]')))
    assert "timm has no model named 'resnet18q'" in message and "resnet18" in message.split("close:")[1]


def test_unsafe_input_size_names_file_key_and_safe_sizes(tmp_path):
    # resnet18: five stride-2 ops (3×3 / 7×7 convs with padding, a 3×3 max pool) each need
    # (H + 2·padding − kernel) even; 224 breaks at the first conv (224 + 6 − 7 = 223 is odd), and
    # 225 = 7·32 + 1 is the nearest safe size (docs/design.md §6 works 224 against 225).
    path = write(tmp_path, RESNET18.replace("input_size = 225", "input_size = 224"))
    message = refusal(path, apply_to="torchvision:resnet18")
    assert str(path) in message and "key convert.input_size" in message
    assert "is 224, not a safe size" in message and "conv1" in message
    assert re.search(r"allowed: the safe sizes nearest 224: 225\b", message)


def test_invalid_toml_names_file_and_line(tmp_path):
    message = refusal(write(tmp_path, RESNET18.replace('group = "c4"', "group = c4")))
    assert str(tmp_path / "mine.toml") in message and "line 7" in message


def test_unknown_recipe_name_lists_the_shipped_ones():
    with pytest.raises(RecipeError) as info:
        load_recipe("resnett")
    assert "close names: resnet" in str(info.value) and "example" in str(info.value)
    with pytest.raises(RecipeError, match="does not exist"):
        load_recipe("no/such/recipe.toml")


# -- command line ---------------------------------------------------------------------------------

runner = CliRunner()


def test_cli_lists_recipes():
    result = runner.invoke(app, ["recipes"], env={"COLUMNS": "250"})
    assert result.exit_code == 0, result.output
    for recipe in list_recipes():
        assert recipe.name in result.output
    assert "resnet18" in result.output and "225" in result.output


def test_cli_shows_one_recipe():
    result = runner.invoke(app, ["recipes", "show", "resnet"], env={"COLUMNS": "250"})
    assert result.exit_code == 0, result.output
    assert "[convert]" in result.output and "input_size" in result.output


def test_cli_show_unknown_recipe_is_one_paragraph(capsys):
    with pytest.raises(SystemExit) as exit_info:
        main(["recipes", "show", "resnett"])
    assert exit_info.value.code == 2
    err = capsys.readouterr().err
    assert "No recipe named 'resnett'" in err and "Traceback" not in err


def test_names_and_paths(tmp_path, monkeypatch):
    # a plain word is a shipped recipe even when a file of that name is in the working folder
    monkeypatch.chdir(tmp_path)
    (tmp_path / "resnet").write_text("not toml [")
    assert load_recipe("resnet").path == shipped_folder() / "resnet.toml"
    write(tmp_path, RESNET18)
    assert load_recipe("mine.toml").name == "mine" and load_recipe("./mine.toml").group == "c4"
