"""Phantoms: the published Shepp-Logan table, exact projections, scikit-image references."""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
import scipy.integrate
import skimage.data
import skimage.transform

from pnpguard import phantoms as ph
from pnpguard.phantoms._cells import _splat
from tests.helpers import assert_close

RANDOM = ("cells", "piecewise_smooth", "porous_disk", "random_ellipses")
GENERATED = (*RANDOM, "shepp_logan", "siemens_star")


def _pixel_at(image: np.ndarray, x: float, y: float) -> float:
    # Pixel whose square contains the point (x, y): the convention of the
    # phantoms' docstrings (shorter side spans [-1, 1], y up, rows downwards).
    height, width = image.shape
    h = 2.0 / min(image.shape)
    return float(image[math.floor(height / 2 - y / h), math.floor(x / h + width / 2)])


# ---------------------------------------------------------------- Shepp-Logan table

# Expected densities at points well inside the structures, summed by hand from
# Shepp & Logan, IEEE Trans. Nucl. Sci. 21(3) 1974, Table 1 (original) and the
# modified densities 1, -.8, -.2, ... (Toft 1996, from memory; THEORY.md section 10).
POINTS = [
    # (x, y), original, modified, structures containing the point
    ((0.0, 0.0), 2.0 - 0.98, 1.0 - 0.8),  # skull + brain
    ((0.0, 0.9), 2.0, 1.0),  # skull rim only (brain reaches y = 0.8556)
    ((0.22, 0.0), 2.0 - 0.98 - 0.02, 1.0 - 0.8 - 0.2),  # right ventricle
    ((-0.22, 0.0), 2.0 - 0.98 - 0.02, 1.0 - 0.8 - 0.2),  # left ventricle
    ((0.0, 0.35), 2.0 - 0.98 + 0.01, 1.0 - 0.8 + 0.1),  # ellipse e
    ((0.0, -0.1), 2.0 - 0.98 + 0.01, 1.0 - 0.8 + 0.1),  # ellipse g
    ((-0.08, -0.605), 2.0 - 0.98 + 0.01, 1.0 - 0.8 + 0.1),  # ellipse h
    ((0.9, 0.9), 0.0, 0.0),  # outside the head
]


@pytest.mark.parametrize("variant, column", [("original", 1), ("modified", 2)])
def test_shepp_logan_levels_match_published_table(variant, column):
    image = ph.shepp_logan(256, variant=variant, supersample=4)
    for point in POINTS:
        (x, y), expected = point[0], point[column]
        assert abs(_pixel_at(image, x, y) - expected) < 1e-12, (variant, (x, y), expected)


def test_shepp_logan_ellipse_table_is_the_published_one():
    # Semi-axes and centres from Shepp & Logan (1974), Table 1; the modified table
    # only changes densities.
    original = ph.shepp_logan_ellipses(variant="original")
    modified = ph.shepp_logan_ellipses(variant="modified")
    assert [(e.x0, e.y0, e.a, e.b, e.tilt) for e in original] == [
        (e.x0, e.y0, e.a, e.b, e.tilt) for e in modified
    ]
    assert [e.intensity for e in original] == [2, -0.98, -0.02, -0.02] + [0.01] * 6
    assert [e.intensity for e in modified] == [1, -0.8, -0.2, -0.2] + [0.1] * 6
    assert original[2].b == 0.31 and original[3].b == 0.41  # ventricles' major semi-axes


@pytest.mark.parametrize(
    "variant, mass, line_x0, line_y0",
    # Check values of THEORY.md section 10 (computed independently, 6 decimals).
    [("original", 2.201757, 1.974260, 1.450712), ("modified", 0.495265, 0.514600, 0.207676)],
)
def test_shepp_logan_mass_and_central_lines(variant, mass, line_x0, line_y0):
    table = ph.shepp_logan_ellipses(variant=variant)
    # Area of an ellipse is pi a b (elementary geometry).
    assert abs(sum(e.intensity * math.pi * e.a * e.b for e in table) - mass) < 1e-6
    # phi = 0 integrates along the vertical line x = t; phi = 90 along y = t.
    lines = ph.ellipse_projection(table, [0.0, 90.0], [0.0])[:, 0]
    assert_close(lines, [line_x0, line_y0], rtol=0, atol=1e-6, what="central lines")
    # The rendered image integrates to the same mass (pixel area h^2).
    image = ph.render_ellipses(table, 256, supersample=4)
    assert abs(image.sum() * (2 / 256) ** 2 - mass) < 1e-4 * abs(mass)


def test_shepp_logan_matches_scikit_image_phantom():
    # skimage.data.shepp_logan_phantom(): 400 x 400, the modified densities stored as
    # 8-bit grey levels (0.298 for 0.3, 0.098 for 0.1), sampled at pixel centres, row 0
    # at the top (y up): the same convention as ours. Inspected, not documented, so the
    # comparison allows boundary pixels to differ.
    reference = skimage.data.shepp_logan_phantom()
    ours = ph.shepp_logan(400, variant="modified", supersample=1)
    assert reference.shape == ours.shape
    agree = np.abs(reference - ours) < 0.01
    assert agree.mean() > 0.99, agree.mean()
    assert np.abs(reference - ours).mean() < 0.006
    # The checks can fail: an upside-down or mirrored-tilt phantom agrees on fewer pixels.
    assert (np.abs(reference - ours[::-1]) < 0.01).mean() < 0.9


def test_shepp_logan_ranges_and_point_sampling():
    modified = ph.shepp_logan(96, supersample=1)
    # Point sampling gives only sums of table densities (Toft levels 0, .1, .2, .3, .4, 1).
    levels = np.unique(np.round(modified, 9))
    assert set(levels) <= {0.0, 0.1, 0.2, 0.3, 0.4, 1.0}, levels
    smooth = ph.shepp_logan(96, supersample=4)
    assert smooth.min() >= 0 and smooth.max() == 1.0
    assert len(np.unique(np.round(smooth, 9))) > 20  # anti-aliased edges blend levels
    original = ph.shepp_logan(96, variant="original")
    assert original.min() >= 0 and original.max() == 2.0
    with pytest.raises(ValueError, match="^unknown `variant` 'toft'; valid: 'modified', 'original'$"):
        ph.shepp_logan(32, variant="toft")


def test_supersampled_grids_nest_exactly():
    # A 128 image with 4 x 4 sub-samples uses the same points as a 256 image with 2 x 2:
    # its pixels are exact 2 x 2 block means of the finer image (checks the grid formula).
    coarse = ph.shepp_logan(128, variant="original", supersample=4)
    fine = ph.shepp_logan(256, variant="original", supersample=2)
    blocks = fine.reshape(128, 2, 128, 2).mean(axis=(1, 3))
    assert_close(coarse, blocks, rtol=0, atol=1e-12, what="block means")


def test_disk_coverage_converges_to_its_area():
    # Area of a disk pi r^2 (elementary): the anti-aliased pixel means integrate to it.
    image = ph.render_ellipses([ph.Ellipse(0.1, -0.2, 0.5, 0.5)], 64, supersample=16)
    assert abs(image.sum() * (2 / 64) ** 2 - math.pi * 0.25) < 1e-3
    assert ((image > 0) & (image < 1)).sum() > 100  # edge pixels are fractional


def test_non_square_images_keep_square_pixels():
    wide = ph.shepp_logan((64, 96), variant="original")
    square = ph.shepp_logan(64, variant="original")
    # The shorter side spans [-1, 1]: the square image sits in the middle columns.
    assert_close(wide[:, 16:80], square, rtol=0, atol=1e-12, what="centre columns")
    assert np.all(wide[:, :16] == 0) and np.all(wide[:, 80:] == 0)


# ---------------------------------------------------------------- exact projections


def _chord_by_intersection(e: ph.Ellipse, phi_deg: float, t: float) -> float:
    # Independent route: intersect the line {t n + s d} (n = (cos phi, sin phi),
    # d = (-sin phi, cos phi)) with the quadric of the ellipse and take s2 - s1 from
    # the roots of a s^2 + b s + c = 0 (quadratic formula).
    phi, tilt = math.radians(phi_deg), math.radians(e.tilt)
    rot = np.array([[math.cos(tilt), math.sin(tilt)], [-math.sin(tilt), math.cos(tilt)]])
    scale = np.diag([1 / e.a**2, 1 / e.b**2])
    q = rot.T @ scale @ rot
    p0 = t * np.array([math.cos(phi), math.sin(phi)]) - [e.x0, e.y0]
    d = np.array([-math.sin(phi), math.cos(phi)])
    a, b, c = d @ q @ d, 2 * d @ q @ p0, p0 @ q @ p0 - 1
    disc = b * b - 4 * a * c
    return e.intensity * math.sqrt(disc) / a if disc > 0 else 0.0


def test_projection_matches_line_ellipse_intersection():
    rng = np.random.default_rng(7)
    table = [
        ph.Ellipse(*rng.uniform(-0.5, 0.5, 2), *rng.uniform(0.05, 0.5, 2),
                   rng.uniform(-180, 180), rng.uniform(-1, 2))
        for _ in range(5)
    ]
    angles, offsets = rng.uniform(-200, 400, 9), rng.uniform(-1.1, 1.1, 40)
    exact = ph.ellipse_projection(table, angles, offsets)
    expected = [[sum(_chord_by_intersection(e, a, t) for e in table) for t in offsets]
                for a in angles]
    assert exact.shape == (9, 40)
    assert_close(exact, expected, rtol=1e-10, atol=1e-12, what="line integrals")
    assert (exact != 0).sum() > 100  # many lines hit the phantom


@pytest.mark.parametrize("phi", [33.0, 137.0])
def test_projection_integrates_to_mass(phi):
    # Fubini: the integral of a projection over t is the total mass (scipy.integrate.quad,
    # split at the support ends t = x0 cos phi + y0 sin phi +- a(phi) of every ellipse).
    table = ph.shepp_logan_ellipses(variant="original")
    ends = sorted({float(c + sign * math.sqrt(a2)) for c, a2 in (
        (e.x0 * math.cos(math.radians(phi)) + e.y0 * math.sin(math.radians(phi)),
         (e.a * math.cos(math.radians(phi - e.tilt))) ** 2
         + (e.b * math.sin(math.radians(phi - e.tilt))) ** 2) for e in table) for sign in (-1, 1)})
    total = sum(
        scipy.integrate.quad(lambda t: ph.ellipse_projection(table, [phi], [t])[0, 0], lo, hi,
                             epsabs=1e-11)[0]
        for lo, hi in zip(ends[:-1], ends[1:])
    )
    assert abs(total - 2.201757) < 1e-6


def test_projection_matches_radon_transform_of_rendered_image():
    # Outside reference: skimage.transform.radon (pixel units, angle theta = our phi,
    # detector bin m at offset (m - N // 2) h). The error shrinks like 1 / N.
    table = (ph.Ellipse(0.2, -0.1, 0.12, 0.5, 30.0, 1.0),
             ph.Ellipse(-0.3, 0.3, 0.3, 0.1, -50.0, 0.5),
             *ph.shepp_logan_ellipses(variant="original"))
    theta = np.linspace(0.0, 180.0, 12, endpoint=False)
    errors = []
    for n in (65, 129):
        h = 2 / n
        image = ph.render_ellipses(table, n, supersample=4)
        sinogram = skimage.transform.radon(image, theta=theta, circle=True).T * h
        exact = ph.ellipse_projection(table, theta, (np.arange(n) - n // 2) * h)
        errors.append(np.linalg.norm(exact - sinogram) / np.linalg.norm(exact))
    assert errors[1] < 0.015 and errors[1] < 0.6 * errors[0], errors


def test_projection_rejects_bad_input():
    table = ph.shepp_logan_ellipses()
    with pytest.raises(ValueError, match="`offsets` must be finite"):
        ph.ellipse_projection(table, [0.0], [np.nan])
    with pytest.raises(ValueError, match="`angles_deg` must be a 1-D array"):
        ph.ellipse_projection(table, [[0.0]], [0.0])
    with pytest.raises(TypeError, match=r"`ellipses\[1\]` must be an Ellipse"):
        ph.ellipse_projection([table[0], (0, 0, 1, 1, 0, 1)], [0.0], [0.0])
    with pytest.raises(ValueError, match="`a` must be a positive finite number"):
        ph.Ellipse(0.0, 0.0, 0.0, 1.0)


# ---------------------------------------------------------------- porous test object


def test_porous_disk_table_and_exact_sinogram():
    table = ph.porous_disk_ellipses(seed=3, holes=30, inclusions=6, radius=0.8, level=0.4)
    disk, features = table[0], table[1:]
    assert (disk.a, disk.intensity) == (0.8, 0.4) and len(features) == 36
    assert sorted({round(e.intensity, 12) for e in features}) == [-0.4, 0.6]
    for i, e in enumerate(features):
        assert math.hypot(e.x0, e.y0) + e.a <= 0.8 - 0.03 + 1e-12
        for o in features[i + 1:]:
            assert math.hypot(e.x0 - o.x0, e.y0 - o.y0) >= e.a + o.a + 0.02 - 1e-12
    image = ph.porous_disk(128, seed=3, holes=30, inclusions=6, radius=0.8, level=0.4)
    # Non-overlapping features: the clip in porous_disk removes nothing but rounding,
    # so the image mass equals the table mass sum rho pi a b.
    mass = sum(e.intensity * math.pi * e.a * e.b for e in table)
    assert abs(image.sum() * (2 / 128) ** 2 - mass) < 2e-3 * mass
    assert {0.0, 0.4, 1.0} <= set(np.round(image, 12).ravel())


def test_porous_disk_refuses_impossible_packing():
    with pytest.raises(ValueError, match="could not place 500 non-touching features"):
        ph.porous_disk_ellipses(holes=500, inclusions=0, radius=0.3)


# ---------------------------------------------------------------- other generators


@pytest.mark.parametrize("name", GENERATED)
def test_generated_phantoms_shape_range_dtype(name):
    image = ph.make_phantom(name, (40, 56), seed=1)
    assert image.shape == (40, 56) and image.dtype == np.float64
    assert image.min() >= 0.0 and image.max() <= 1.0
    assert image.std() > 0.01  # not blank


@pytest.mark.parametrize("name", RANDOM)
def test_seeds_reproduce_and_differ(name):
    first = ph.make_phantom(name, 48, seed=5)
    again = ph.make_phantom(name, 48, seed=5)
    other = ph.make_phantom(name, 48, seed=6)
    from_generator = ph.make_phantom(name, 48, seed=np.random.default_rng(5))
    assert np.array_equal(first, again)
    assert np.array_equal(first, from_generator)
    assert np.abs(first - other).mean() > 1e-3


def test_random_ellipses_levels():
    image = ph.random_ellipses(64, seed=2, count=5, supersample=1)
    levels = np.unique(image)
    # Occlusion painting with point sampling: background plus at most 5 levels in [0.1, 1].
    assert levels[0] == 0.0 and 2 <= len(levels) <= 6
    assert levels[1] >= 0.1 and levels[-1] <= 1.0


def test_siemens_star_sectors_and_symmetry():
    # 10 spokes: no sector border lies on a diagonal, where sub-sample points sit
    # exactly on the border and rounding decides their side.
    star = ph.siemens_star(201, spokes=10, supersample=8)
    step = math.pi / 10
    for k in range(10):
        # Centre of the k-th bright and dark sector at radius 0.6.
        bright, dark = (2 * k + 0.5) * step, (2 * k + 1.5) * step
        assert _pixel_at(star, 0.6 * math.cos(bright), 0.6 * math.sin(bright)) > 0.99
        assert _pixel_at(star, 0.6 * math.cos(dark), 0.6 * math.sin(dark)) < 0.01
    assert _pixel_at(star, 0.95, 0.0) == 0.5  # surround
    # sin(n (theta + pi)) = sin(n theta) for even n: invariant under a half turn.
    assert_close(np.rot90(star, 2), star, rtol=0, atol=1e-12, what="half turn")
    sine = ph.siemens_star(201, spokes=10, profile="sine")
    ring = np.abs(np.hypot(*np.meshgrid(np.arange(201) - 100, np.arange(201) - 100)) - 60) < 1
    assert abs(sine[ring].mean() - 0.5) < 0.02
    with pytest.raises(ValueError, match="^unknown `profile` 'square'; valid: 'binary', 'sine'"):
        ph.siemens_star(32, profile="square")


def test_piecewise_smooth_is_smooth_between_edges():
    image = ph.piecewise_smooth(128, seed=4, regions=6)
    jumps = np.abs(np.diff(image, axis=1)) > 0.03
    # Most neighbouring pixels differ by little; a few border pixels jump.
    assert 0.002 < jumps.mean() < 0.1, jumps.mean()
    assert len(np.unique(np.round(image, 3))) > 100  # shaded, not piecewise constant
    one = ph.piecewise_smooth(64, seed=4, regions=1)
    assert np.abs(np.diff(one, axis=0)).max() < 0.03  # a single region has no edge


def test_cells_frame_properties():
    frame = ph.cells(128, seed=3)
    assert frame.max() == 1.0 and frame.min() > 0.0
    assert np.median(frame) < 0.1  # dark background dominates
    assert 0.05 < (frame > 0.1).mean() < 0.7  # cells cover part of the frame
    # Same scene at another resolution: the 256 frame's 2 x 2 block means correlate
    # with the 128 frame (each is normalised by its own maximum).
    fine = ph.cells(256, seed=3).reshape(128, 2, 128, 2).mean(axis=(1, 3))
    assert np.corrcoef(fine.ravel(), frame.ravel())[0, 1] > 0.99
    with pytest.raises(ValueError, match="could not place 60 cells"):
        ph.cells(64, count=60)


def test_gaussian_splat_is_exact_pixel_mean():
    # Pixel means of a Gaussian of total mass m against scipy.integrate.dblquad of its
    # density over single pixels, and the total mass m (density normalisation).
    image = np.zeros((64, 64))
    centre, sigma, mass = (0.1, -0.05), 0.1, 0.3
    _splat(image, np.array([centre]), np.array([sigma]), np.array([mass]))
    assert abs(image.sum() * (2 / 64) ** 2 - mass) < 1e-9
    h = 2 / 64

    def density(y, x):
        r2 = (x - centre[0]) ** 2 + (y - centre[1]) ** 2
        return mass * math.exp(-r2 / (2 * sigma**2)) / (2 * math.pi * sigma**2)

    for row, col in [(33, 35), (30, 40), (20, 20)]:
        x0, y1 = (col - 32) * h, (32 - row) * h
        expected = scipy.integrate.dblquad(density, x0, x0 + h, y1 - h, y1)[0] / h**2
        assert abs(image[row, col] - expected) < 1e-9 * max(1.0, expected), (row, col)


# ---------------------------------------------------------------- natural images


def test_natural_images_load_offline_in_unit_range():
    names = ph.natural_image_names()
    assert list(names) == sorted(names) and {"camera", "moon", "cell", "coins"} <= set(names)
    for name in names:
        image = ph.natural_image(name)
        raw = getattr(skimage.data, name)()
        assert image.shape == raw.shape[:2] and image.dtype == np.float64, name
        assert 0.0 <= image.min() and image.max() <= 1.0 and image.std() > 0.02, name
    # 8-bit grey images are divided by 255 exactly.
    assert np.array_equal(ph.natural_image("camera"), skimage.data.camera() / 255.0)


def test_natural_image_crop_and_resize():
    image = ph.natural_image("camera", (64, 128))
    assert image.shape == (64, 128) and 0 <= image.min() and image.max() <= 1
    # Same as the centred 256 x 512 crop of the 512 x 512 camera, resized by skimage.
    crop = skimage.data.camera()[128:384] / 255.0
    expected = skimage.transform.resize(crop, (64, 128), order=1, anti_aliasing=True)
    assert_close(image, expected, rtol=0, atol=1e-12, what="crop and resize")
    assert ph.natural_image("text", (172, 448)).shape == (172, 448)


# ---------------------------------------------------------------- registry and errors


def test_registry_names_and_unknown_name_error():
    names = ph.phantom_names()
    assert list(names) == sorted(names)
    assert set(GENERATED) <= set(names) and "natural:camera" in names
    with pytest.raises(ValueError) as info:
        ph.make_phantom("shep_logan", 32)
    message = str(info.value)
    assert message.startswith("unknown phantom name 'shep_logan'; valid: ")
    listed = re.findall(r"'([^']+)'", message.split("valid: ")[1].split(";")[0])
    assert listed == list(names)
    assert message.endswith("; did you mean 'shepp_logan'?")
    assert ph.make_phantom("natural:moon", 32).shape == (32, 32)


@pytest.mark.parametrize(
    ("shape", "error"),
    [(0, ValueError), ((0, 8), ValueError), ((8,), ValueError), ((8, 8, 8), ValueError),
     (8.0, TypeError), ("8", TypeError), ((True, 8), TypeError)],
)
def test_bad_shapes_are_rejected(shape, error):
    # Out of range: ValueError; not integers: TypeError (the library's rule, _validation).
    with pytest.raises(error, match="`shape` must be a pair of positive integers"):
        ph.make_phantom("shepp_logan", shape)


@pytest.mark.parametrize(("seed", "error"), [(-1, ValueError), (1.5, TypeError), (True, TypeError),
                                             ("0", TypeError), (None, TypeError)])
def test_bad_seeds_are_rejected(seed, error):
    with pytest.raises(error, match="`seed` must be a non-negative integer"):
        ph.make_phantom("cells", 32, seed=seed)


def test_bad_options_are_rejected():
    with pytest.raises(ValueError, match="`supersample` must be a positive integer"):
        ph.shepp_logan(32, supersample=0)
    with pytest.raises(ValueError, match="`spokes` must be an integer >= 2"):
        ph.siemens_star(32, spokes=1)
    with pytest.raises(ValueError, match="unknown `name` 'lena'; valid: 'astronaut'"):
        ph.natural_image("lena")
    with pytest.raises(ValueError, match="`level` must be"):
        ph.porous_disk(32, level=1.0)
