"""Tests for orbify.symmetry.resample: rotating filters and images by angles off the 90° grid.

References: numpy.rot90 (exact quarter turns, counter-clockwise as displayed) and
scipy.ndimage.rotate with order=1 (bilinear rotation by any angle), both from their documentation.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import ndimage

from orbify.errors import InputShapeError, OptionError
from orbify.symmetry.resample import METHODS, central_disk_mask, kernel_rotation_matrix, rotate_images


def scipy_rotate(a: np.ndarray, degrees: float, mode: str = "constant") -> np.ndarray:
    """scipy.ndimage.rotate in the plane of the last two axes, bilinear, same shape.

    scipy documentation: ``rotate`` turns the plane of ``axes`` (default (1, 0)); with that order a
    positive angle is counter-clockwise as displayed, the sense of numpy.rot90 (established in
    test_scipy_positive_angle_is_numpy_rot90). ``mode="grid-constant"`` interpolates with zeros
    beyond the edge; ``"constant"`` does not interpolate there (only edges differ).
    """
    return ndimage.rotate(a, degrees, axes=(-1, -2), reshape=False, order=1, mode=mode)


def numpy_rot90(a: np.ndarray, k: int) -> torch.Tensor:
    """numpy.rot90 in the plane of the last two axes (numpy documentation: counter-clockwise)."""
    return torch.from_numpy(np.rot90(a, k, axes=(-2, -1)).copy())


def rot90_permutation(size: int, k: int) -> torch.Tensor:
    """Matrix of numpy.rot90 on flattened size×size filters, one unit filter at a time."""
    units = np.eye(size * size).reshape(-1, size, size)
    return numpy_rot90(units, k).reshape(size * size, size * size).T


def sample_rotated(pattern, size: int, angle: float) -> np.ndarray:
    """Sample a continuous pattern, rotated counter-clockwise by angle, at the size×size pixel centres.

    The rotated pattern at point p is the pattern at R(-angle)·p (x right, y up, origin at the centre).
    """
    c = (size - 1) / 2
    i, j = np.mgrid[0:size, 0:size]
    x, y = j - c, c - i
    cos, sin = math.cos(angle), math.sin(angle)
    return pattern(cos * x + sin * y, -sin * x + cos * y)


def offset_anisotropic_gaussian(x, y):
    """Elongated Gaussian (widths 1.1 and 0.55 px, axis at 0.4 rad) centred off the origin at (0.6, 0.3)."""
    u, v = x - 0.6, y - 0.3
    along, across = math.cos(0.4) * u + math.sin(0.4) * v, -math.sin(0.4) * u + math.cos(0.4) * v
    return np.exp(-(along**2) / (2 * 1.1**2) - across**2 / (2 * 0.55**2))


def gaussian_derivative(x, y):
    """First derivative of a unit Gaussian along the direction 0.3 rad (an edge detector)."""
    along = math.cos(0.3) * x + math.sin(0.3) * y
    return -along * np.exp(-(x**2 + y**2) / 2)


SMOOTH_PATTERNS = [offset_anisotropic_gaussian, gaussian_derivative]


def relative_error(estimate: np.ndarray, truth: np.ndarray) -> float:
    return float(np.linalg.norm(estimate - truth) / np.linalg.norm(truth))


# --- images ----------------------------------------------------------------------------------


def test_scipy_positive_angle_is_numpy_rot90():
    # Establishes the sense of the scipy reference against numpy.rot90 (both documentation).
    a = np.random.default_rng(0).normal(size=(2, 7, 7))
    np.testing.assert_allclose(scipy_rotate(a, 90), np.rot90(a, 1, axes=(-2, -1)), atol=1e-12)
    assert not np.allclose(scipy_rotate(a, -90), np.rot90(a, 1, axes=(-2, -1)))


@pytest.mark.parametrize("degrees", [30, 45, 137])
@pytest.mark.parametrize("shape", [(33, 33), (32, 32), (24, 31)])
@pytest.mark.parametrize("mirror", [False, True])
def test_rotate_images_matches_scipy_on_central_disk(degrees, shape, mirror):
    # Reference: scipy.ndimage.rotate(..., reshape=False, order=1) (scipy documentation), mirrored
    # first with numpy.flip when asked.
    a = np.random.default_rng(1).normal(size=(2, 3, *shape))
    ours = rotate_images(torch.from_numpy(a), math.radians(degrees), mirror=mirror)
    reference = scipy_rotate(np.flip(a, -1) if mirror else a, degrees)
    disk = central_disk_mask(*shape)
    assert ours.shape == a.shape
    torch.testing.assert_close(ours[..., disk], torch.from_numpy(reference)[..., disk], rtol=0, atol=1e-10)


def test_rotate_images_matches_scipy_everywhere_with_zero_padding():
    # scipy documentation: mode="grid-constant" interpolates with zeros beyond the edge, which is
    # what rotate_images does, so the two agree on the whole image, corners included.
    a = np.random.default_rng(2).normal(size=(19, 26))
    ours = rotate_images(torch.from_numpy(a), math.radians(-70))
    torch.testing.assert_close(ours, torch.from_numpy(scipy_rotate(a, -70, mode="grid-constant")), rtol=0, atol=1e-10)


def test_rotate_images_float32_matches_scipy_within_float_rounding():
    # Reference: scipy.ndimage.rotate, order=1 (scipy documentation), computed in float64.
    a = np.random.default_rng(3).normal(size=(4, 21, 21))
    ours = rotate_images(torch.from_numpy(a).float(), math.radians(30))
    disk = central_disk_mask(21, 21)
    assert ours.dtype == torch.float32
    torch.testing.assert_close(ours[..., disk].double(), torch.from_numpy(scipy_rotate(a, 30))[..., disk], rtol=0, atol=1e-5)


@pytest.mark.parametrize("k", range(-2, 6))
@pytest.mark.parametrize("shape", [(6, 6), (5, 8)])
@pytest.mark.parametrize("mirror", [False, True])
def test_rotate_images_quarter_turns_equal_numpy_rot90(k, shape, mirror):
    # Reference: numpy.rot90 and numpy.flip (numpy documentation); exact, any dtype.
    a = np.arange(3 * shape[0] * shape[1]).reshape(3, *shape)
    expected = numpy_rot90(np.flip(a, -1) if mirror else a, k)
    assert torch.equal(rotate_images(torch.from_numpy(a), k * math.pi / 2, mirror=mirror), expected)


def test_interpolating_path_turns_the_same_way_as_rot90():
    # Just past 90° the interpolating path is taken; it must land next to numpy.rot90 (numpy
    # documentation), which pins its sense and pixel-centre alignment to the exact path.
    a = np.random.default_rng(4).normal(size=(15, 15))
    ours = rotate_images(torch.from_numpy(a), math.pi / 2 + 1e-6)
    disk = central_disk_mask(15, 15)
    torch.testing.assert_close(ours[disk], numpy_rot90(a, 1)[disk], rtol=0, atol=1e-4)


@pytest.mark.parametrize(("h", "w", "count"), [(7, 7, 13), (11, 11, 49), (7, 11, 13), (9, 9, 29)])
def test_central_disk_mask_counts_lattice_points(h, w, count):
    # With an odd side the centre is a pixel and the mask radius (min - 1)/2 - 1 is an integer r;
    # lattice points with x² + y² <= r²: 13, 29, 49 for r = 2, 3, 4 (Gauss circle problem, OEIS
    # A000328; from memory, and 13 recounted by hand).
    mask = central_disk_mask(h, w)
    assert mask.shape == (h, w) and mask.dtype == torch.bool
    assert int(mask.sum()) == count
    assert torch.equal(mask, mask.flip(-1)) and torch.equal(mask, mask.flip(-2))


@settings(max_examples=25, deadline=None)
@given(angle=st.floats(-2 * math.pi, 2 * math.pi), h=st.integers(5, 24), w=st.integers(5, 24))
def test_rotation_stays_inside_the_image_on_the_disk(angle, h, w):
    # Bilinear weights sum to one when all four neighbours lie inside the image (common practice):
    # a rotated all-ones image is exactly one on the central disk, whatever the angle.
    ones = torch.ones(h, w, dtype=torch.float64)
    rotated = rotate_images(ones, angle)
    disk = central_disk_mask(h, w) if rotated.shape == (h, w) else central_disk_mask(w, h)
    torch.testing.assert_close(rotated[disk], torch.ones(int(disk.sum()), dtype=torch.float64), rtol=0, atol=1e-12)


# --- filters ---------------------------------------------------------------------------------


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("size", [1, 2, 3, 4, 5, 7])
@pytest.mark.parametrize("k", [-1, 0, 1, 2, 3, 5])
def test_kernel_matrix_at_quarter_turns_is_the_rot90_permutation(method, size, k):
    # Reference: numpy.rot90 of every unit filter (numpy documentation); k = 0 is the identity.
    matrix = kernel_rotation_matrix(size, k * math.pi / 2, method)
    assert matrix.dtype == torch.float64 and matrix.shape == (size * size, size * size)
    torch.testing.assert_close(matrix, rot90_permutation(size, k), rtol=0, atol=1e-12)
    if k == 0:
        assert torch.equal(matrix, torch.eye(size * size, dtype=torch.float64))


@pytest.mark.parametrize("size", [3, 5, 7])
@pytest.mark.parametrize("degrees", [30, 45, 137, -20])
def test_bilinear_kernel_matrix_matches_scipy(size, degrees):
    # Reference: scipy.ndimage.rotate, order=1, zeros beyond the edge (mode="grid-constant").
    kernel = np.random.default_rng(size).normal(size=(size, size))
    matrix = kernel_rotation_matrix(size, math.radians(degrees), "bilinear")
    rotated = (matrix @ torch.from_numpy(kernel).flatten()).reshape(size, size)
    torch.testing.assert_close(rotated, torch.from_numpy(scipy_rotate(kernel, degrees, mode="grid-constant")),
                               rtol=0, atol=1e-10)


@pytest.mark.parametrize("size", [5, 7])
@pytest.mark.parametrize("pattern", SMOOTH_PATTERNS)
def test_harmonic_rotates_smooth_filters_better_than_bilinear(size, pattern):
    # Reference: the continuous pattern rotated analytically and sampled. Measured (relative L2,
    # 45°): harmonic 0.13 / 0.045, bilinear 0.22 / 0.20 for the Gaussian / its derivative.
    angle = math.pi / 4
    before = torch.from_numpy(sample_rotated(pattern, size, 0.0)).flatten()
    truth = sample_rotated(pattern, size, angle).flatten()
    errors = {method: relative_error((kernel_rotation_matrix(size, angle, method) @ before).numpy(), truth)
              for method in METHODS}
    assert errors["harmonic"] < 0.7 * errors["bilinear"], errors


@pytest.mark.parametrize("size", [3, 5, 7])
def test_two_eighth_turns_compose_to_a_quarter_turn(size):
    # Group law of rotations (textbook): R(45°)·R(45°) = R(90°), and R(90°) is exact (numpy.rot90).
    # Measured relative Frobenius error of the matrices, harmonic vs bilinear: 0.45 vs 0.65 (3×3),
    # 0.55 vs 0.70 (5×5, 7×7); the rest is grid-scale detail no rotation of a pixel grid keeps.
    # On smooth filters: harmonic 0.05-0.12, bilinear 0.26-0.50.
    quarter = rot90_permutation(size, 1)
    errors = {}
    for method in METHODS:
        eighth = kernel_rotation_matrix(size, math.pi / 4, method)
        matrix_error = float(torch.linalg.matrix_norm(eighth @ eighth - quarter) / torch.linalg.matrix_norm(quarter))
        smooth = torch.from_numpy(sample_rotated(offset_anisotropic_gaussian, size, 0.0)).flatten()
        smooth_error = relative_error((eighth @ eighth @ smooth).numpy(), (quarter @ smooth).numpy())
        errors[method] = (matrix_error, smooth_error)
    assert errors["harmonic"][0] < errors["bilinear"][0], errors
    assert errors["harmonic"][1] < 0.6 * errors["bilinear"][1], errors


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("seam_degrees", [45, 135, -45])
def test_kernel_matrix_is_continuous_across_the_quarter_turn_seams(method, seam_degrees):
    # Either side of ±45° the matrix is built from a different quarter turn and a resampling of
    # opposite sign; they meet only if the resampling turns the same way as numpy.rot90.
    seam = math.radians(seam_degrees)
    below, above = (kernel_rotation_matrix(5, seam + step, method) for step in (-1e-7, 1e-7))
    torch.testing.assert_close(below, above, rtol=0, atol=1e-5)


@pytest.mark.parametrize("method", METHODS)
def test_kernel_matrix_is_a_fresh_copy_of_the_cached_one(method):
    first = kernel_rotation_matrix(5, 0.3, method)
    expected = first.clone()
    first.zero_()
    assert torch.equal(kernel_rotation_matrix(5, 0.3, method), expected)


def test_harmonic_rotation_keeps_filter_energy_close():
    # A rotation preserves the L2 norm of a continuous filter; the resampled one stays within 5 %.
    before = sample_rotated(gaussian_derivative, 7, 0.0).flatten()
    for angle in np.linspace(0.1, 1.5, 8):
        after = kernel_rotation_matrix(7, float(angle), "harmonic").numpy() @ before
        assert abs(np.linalg.norm(after) / np.linalg.norm(before) - 1) < 0.05


# --- bad input -------------------------------------------------------------------------------


@pytest.mark.parametrize(("size", "angle", "method"), [(0, 0.1, "harmonic"), (2.5, 0.1, "harmonic"),
                                                       (True, 0.1, "bilinear"), (3, math.nan, "harmonic"),
                                                       (3, 0.1, "nearest")])
def test_kernel_matrix_rejects_bad_arguments(size, angle, method):
    with pytest.raises(OptionError):
        kernel_rotation_matrix(size, angle, method)


def test_rotate_images_rejects_bad_input():
    with pytest.raises(InputShapeError):
        rotate_images(torch.zeros(5), 0.3)
    with pytest.raises(InputShapeError):
        rotate_images(torch.zeros(5, 5, dtype=torch.int64), 0.3)
    with pytest.raises(OptionError):
        rotate_images(torch.zeros(5, 5), math.inf)
