"""Blind lattice estimation (claimkit.mark.geometry) against transforms made by other people's code.

Every distorted copy is made with Pillow (``Image.rotate``, ``Image.resize``)
or scikit-image (``transform.rescale``, ``transform.warp``), never with the
project's own resampling, so the true geometry is known independently of the
code under test.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from PIL import Image
from scipy import ndimage
from skimage import data
from skimage import transform as sktf

from claimkit.evidence import keys
from claimkit.imageio import add_luma_delta, to_luma
from claimkit.mark import detect, geometry, scales
from claimkit.mark.format3 import EmbedKeys
from claimkit.mark.pattern import TILE, key_pattern
from claimkit.stress import jpeg, resize, rotate_crop
from tests.engine_helpers import SEED, lanczos, landscape, mark, noise, payload, photos

ROTATION_TOL_DEG = 0.1   # much tighter than the 0.5 degrees the issue asks of the whole examination
SCALE_TOL = 0.003        # likewise (the issue asks 2 %)


def true_transform(rot_deg: float = 0.0, scale: float = 1.0, sx: float = 1.0, sy: float = 1.0) -> np.ndarray:
    """Original (row, col) -> copy (row, col) for a counter-clockwise turn on screen, then axis scales."""
    t = math.radians(rot_deg)
    c, s = math.cos(t), math.sin(t)
    turn = np.array([[c, -s], [s, c]])   # row axis points down, so a screen CCW turn is this
    return np.diag([sy, sx]) @ turn * scale


def lattice_error(basis: np.ndarray, truth: np.ndarray) -> tuple[float, float, float]:
    """Residual rotation (deg), scale and shear of ``basis`` against ``TILE * truth``.

    The lattice fixes the transform only up to the eight symmetries of the
    square, so the symmetry that fits best is taken out first.
    """
    m = np.linalg.solve(TILE * truth, basis)          # ~ a signed permutation matrix
    d = np.rint(m)
    assert abs(abs(np.linalg.det(d)) - 1) < 1e-9 and np.all(np.abs(d).sum(axis=0) == 1), m
    q = m @ np.linalg.inv(d)                          # ~ identity
    angle = math.degrees(math.atan2(q[1, 0] - q[0, 1], q[0, 0] + q[1, 1]))
    scale = math.sqrt(abs(np.linalg.det(q)))
    s = np.linalg.svd(q, compute_uv=False)
    return angle, scale - 1.0, s[0] / s[1] - 1.0


def best_match(copy: np.ndarray, truth: np.ndarray) -> tuple[int, tuple[float, float, float]]:
    lats = geometry.find_lattices(detect.whiten(to_luma(copy)), TILE)
    for i, lat in enumerate(lats):
        try:
            err = lattice_error(lat.basis, truth)
        except AssertionError:
            continue
        if abs(err[0]) < 1 and abs(err[1]) < 0.02:
            return i, err
    raise AssertionError(f"no candidate near the truth: {[lat.basis.round(1).tolist() for lat in lats]}")


@pytest.fixture(scope="module")
def hubble():
    """The hard case: a dark, noisy photo whose own spectrum hides the mark's lattice peaks."""
    return mark(data.hubble_deep_field())


@pytest.fixture(scope="module")
def coffee():
    return mark(data.coffee())


def skimage_rescale(a: np.ndarray, f: float) -> np.ndarray:
    out = sktf.rescale(a / 255.0, f, anti_aliasing=True, channel_axis=-1, order=3)
    return np.clip(np.rint(out * 255), 0, 255).astype(np.uint8)


CASES = [
    # name, picture, attack, true transform
    ("Pillow rotate 17", "hubble", lambda a: rotate_crop(a, 17), true_transform(17)),
    ("Pillow rotate 45", "hubble", lambda a: rotate_crop(a, 45), true_transform(45)),
    ("Pillow rotate -128", "coffee", lambda a: rotate_crop(a, -128), true_transform(-128)),
    ("skimage rescale 0.5", "hubble", lambda a: skimage_rescale(a, 0.5), true_transform(scale=0.5)),
    ("skimage rescale 1.6", "coffee", lambda a: skimage_rescale(a, 1.6), true_transform(scale=1.6)),
    ("Pillow width x0.9", "hubble", lambda a: resize(a, 0.9, 1.0), true_transform(sx=0.9)),
    # Squeezed first, turned after: the squeeze is along the original's axes, not the copy's.
    ("Pillow width x1.07 then rotate 33", "hubble", lambda a: rotate_crop(resize(a, 1.07, 1.0), 33),
     true_transform(33) @ np.diag([1.0, 1.07])),
    ("Pillow rotate 20 then height x0.93", "coffee", lambda a: resize(rotate_crop(a, 20), 1.0, 0.93),
     true_transform(20, sy=0.93)),
    ("Pillow shrink 0.6, rotate 2, JPEG 70", "hubble",
     lambda a: jpeg(rotate_crop(resize(a, 0.6), 2), 70), true_transform(2, 0.6)),
]


@pytest.mark.parametrize("name,pic,attack,truth", CASES, ids=[c[0] for c in CASES])
def test_lattice_estimate_matches_the_true_geometry(request, name, pic, attack, truth):
    copy = attack(request.getfixturevalue(pic))
    rank, (rot_err, scale_err, shear) = best_match(copy, truth)
    assert rank == 0, name                            # the mark's lattice is the best candidate
    assert abs(rot_err) <= ROTATION_TOL_DEG, (name, rot_err)
    assert abs(scale_err) <= SCALE_TOL, (name, scale_err)
    assert abs(shear) <= 2 * SCALE_TOL, (name, shear)


def test_general_affine_map_made_by_skimage_warp():
    # A periodic noise pattern (period TILE) under rotation + unequal scales + shear,
    # warped by scikit-image: the lattice is a general parallelogram.
    rng = np.random.default_rng(5)
    tile = rng.normal(0, 1, (TILE, TILE))
    big = np.tile(tile, (7, 7))
    aff = sktf.AffineTransform(rotation=0.35, scale=(1.15, 1.05), shear=0.04)
    warped = sktf.warp(big, aff.inverse, output_shape=(700, 700), order=3)
    x = detect.whiten(warped[50:650, 50:650] * 40 + 128)
    lat = geometry.find_lattices(x, TILE)[0]
    # skimage works in (x, y); our transforms in (row, col).
    swap = np.array([[0.0, 1.0], [1.0, 0.0]])
    truth = swap @ aff.params[:2, :2] @ swap
    m = np.linalg.solve(TILE * truth, lat.basis)
    d = np.rint(m)
    assert np.allclose(m, d, atol=2e-3), m
    assert abs(abs(np.linalg.det(d)) - 1) < 1e-9


def test_candidates_are_ranked_distinct_and_repeatable(hubble):
    x = detect.whiten(to_luma(rotate_crop(hubble, 17)))
    a = geometry.find_lattices(x, TILE, candidates=3)
    b = geometry.find_lattices(x, TILE, candidates=3)
    assert 1 <= len(a) <= 3
    assert [lat.score for lat in a] == sorted((lat.score for lat in a), reverse=True)
    # No candidate is an alias (sub- or super-lattice) of another.
    for i in range(len(a)):
        for j in range(i + 1, len(a)):
            assert not geometry._related(a[i].basis, a[j].basis)
    # Deterministic: the search uses no key and no randomness.
    assert all(np.array_equal(p.basis, q.basis) for p, q in zip(a, b, strict=True))


def test_tiny_copies_give_no_lattice_rather_than_an_error():
    x = detect.whiten(np.random.default_rng(1).normal(128, 20, (40, 300)).astype(np.float32))
    assert geometry.find_lattices(x, TILE) == []


def tiled_floor(h: int = 640, w: int = 800, period: float = 97.0, angle: float = 13.0) -> np.ndarray:
    """A generated tiled floor: checker tiles with dark grout, turned, with sensor noise."""
    yy, xx = np.mgrid[0:h, 0:w].astype(float)
    t = math.radians(angle)
    u = xx * math.cos(t) + yy * math.sin(t)
    v = -xx * math.sin(t) + yy * math.cos(t)
    grout = ((u % period) < 5) | ((v % period) < 5)
    checker = (np.floor(u / period) + np.floor(v / period)) % 2
    img = 120 + 60 * checker - 70 * grout + np.random.default_rng(3).normal(0, 6, (h, w))
    return np.clip(img, 0, 255).astype(np.uint8)


def test_marked_tiled_floor_is_found_despite_its_own_lattice():
    # The floor's own lattice is far stronger than the mark's; the mark's must
    # still be among the candidates, and the copy must be claimed.
    rgb = np.stack([tiled_floor()] * 3, axis=-1)
    copy = rotate_crop(mark(rgb), 17)
    f = detect.examine_luma(to_luma(copy), SEED,
                            payload_check=lambda b: np.array_equal(b, payload()))
    assert f.detected and f.payload_bits == payload().tolist()
    assert abs(f.geometry["rotation_deg"] - 17) <= 0.5


def test_null_calibration_after_the_geometric_search_on_textures():
    """Unmarked pictures with strong periodic texture of their own, turned and rescaled by Pillow.

    The search locks onto the texture's lattice; the false-alarm bound must
    still hold: the fraction of (picture, key) pairs with P_fa <= p is at most
    p, and nothing is claimed.
    """
    pics = []
    for base in (data.brick(), data.grass(), data.gravel(), data.text(), tiled_floor(),
                 np.kron((np.indices((12, 14)).sum(0) % 2) * 150 + 50, np.ones((61, 61))).astype(np.uint8)):
        base = np.ascontiguousarray(base)
        pics += [base, rotate_crop(base, 10), resize(base, 0.8)]
    rng = np.random.default_rng(23)
    pvals = []
    lattices_found = 0
    for pic in pics:
        luma = to_luma(pic)
        prep = detect.prepare(luma)      # key-independent; reused for every key
        lattices_found += sum(lat is not None for lat in prep.lattices)
        for _ in range(6):
            f = detect.examine_luma(luma, rng.bytes(32), payload_check=lambda b: False,
                                    prepared=prep)
            assert not f.detected
            # Every geometric hypothesis counts, found or not.
            assert f.hypotheses == detect.hypotheses(TILE)
            pvals.append(f.false_alarm_probability)
    key_pattern.cache_clear()
    assert lattices_found >= len(pics)   # the textures did offer lattices to the search
    pvals = np.asarray(pvals)
    for p in (0.01, 0.05, 0.2):
        assert np.mean(pvals <= p) <= p, p


def test_lattice_search_cost_does_not_depend_on_the_key():
    # The geometric hypotheses are fixed before any key is used: the search
    # takes the whitened copy and the period only.
    import inspect

    params = inspect.signature(geometry.find_lattices).parameters
    assert list(params)[:2] == ["x", "tile"]
    assert "seed" not in params and "pattern" not in params
    assert detect.GEOMETRIES == 1 + geometry.LATTICE_CANDIDATES


def test_flattened_lag_map_shows_a_known_period():
    # A noise pattern repeating every 100 px horizontally and 90 px vertically
    # must give its strongest off-centre peaks exactly at those lags.
    rng = np.random.default_rng(2)
    img = np.tile(rng.normal(0, 1, (90, 100)), (6, 6)).astype(np.float32)
    acf = geometry.lag_map(img)
    c = acf.c
    assert acf.z[c, c + 100] > 10 and acf.z[c + 90, c] > 10
    assert acf.z[c, c + 100] > 5 * np.abs(acf.z[c + 20:c + 60, c + 20:c + 60]).max()


def test_pillow_rotate_convention():
    # Independent check of the sign convention the tests rely on: Pillow's
    # rotate(+90) turns counter-clockwise on screen (top-right goes to top-left).
    a = np.zeros((4, 4), dtype=np.uint8)
    a[0, 3] = 255
    r = np.asarray(Image.fromarray(a).rotate(90))
    assert r[0, 0] == 255
    # ... and true_transform(+90) maps the original's +col step to the copy's -row step.
    assert np.allclose(true_transform(90) @ np.array([0.0, 1.0]), [-1.0, 0.0])


# ---------------------------------------------------------------- fast paths against scipy.ndimage

def test_polar_sampler_is_bilinear_interpolation_as_scipy_does_it():
    # The cached sparse map must give scipy.ndimage.map_coordinates(order=1)
    # at the grid's lags (reference: scipy.ndimage).
    rng = np.random.default_rng(5)
    cc = geometry.COARSE_LAG + 4
    lag_map = rng.normal(0, 1, (2 * cc + 1, 2 * cc + 1)).astype(np.float32)
    lo, d, n_rho, n_phi = float(np.log(50.0)), 0.008, 180, 196
    for a in (1.0, 0.93):
        coords = geometry._polar_coords(cc, lo, d, n_rho, n_phi, a).reshape(2, -1)
        want = ndimage.map_coordinates(lag_map, coords, order=1)
        got = geometry._polar_sampler(lag_map.shape, cc, lo, d, n_rho, n_phi, a) @ lag_map.ravel()
        np.testing.assert_allclose(got, want, atol=1e-5)


def test_top_maxima_are_the_peaks_a_maximum_filter_finds():
    # Reference: scipy.ndimage.maximum_filter with rows clamped and columns circular.
    rng = np.random.default_rng(6)
    for shape, keep in (((60, 80), 6), ((40, 50), 4), ((9, 12), 3)):
        score = ndimage.gaussian_filter(rng.normal(0, 1, shape), 1.5, mode=("nearest", "wrap"))
        mx = ndimage.maximum_filter(score, size=(7, 7), mode=("nearest", "wrap"))
        where = np.argwhere((score == mx) & (score > 0))
        vals = score[where[:, 0], where[:, 1]]
        want = [tuple(where[i]) for i in np.argsort(vals)[::-1][:keep]]
        got = [(i, j) for i, j, _ in geometry._top_maxima(score, keep)]
        assert got == want


def test_whitening_in_strips_equals_whole_picture_filters():
    # Reference: scipy.ndimage.uniform_filter over the whole picture.
    rng = np.random.default_rng(7)
    luma = (128 + 40 * ndimage.gaussian_filter(rng.normal(0, 1, (3 * detect.WHITEN_ROWS + 37, 300)), 2)
            ).astype(np.float32)
    x = luma - ndimage.uniform_filter(luma, detect.PREFILTER, mode="reflect")
    var = ndimage.uniform_filter(x * x, detect.NORM_WINDOW, mode="reflect") + np.float32(1e-3)
    np.testing.assert_allclose(detect.whiten(luma), x / np.sqrt(var), rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("shape", [(40, 33), (detect.WHITEN_ROWS, 70), (2 * detect.WHITEN_ROWS + 9, 51)])
def test_whitening_into_reused_buffers_is_the_strip_formula_bit_for_bit(shape):
    # The strips written plainly, each step a new array (scipy.ndimage.uniform_filter):
    # whiten's buffers must give exactly these values.
    luma = np.random.default_rng(3).integers(0, 256, shape).astype(np.uint8)
    x = luma.astype(np.float32)
    halo = detect.PREFILTER // 2 + detect.NORM_WINDOW // 2
    want = np.empty_like(x)
    for r0 in range(0, shape[0], detect.WHITEN_ROWS):
        a0, a1 = max(0, r0 - halo), min(shape[0], r0 + detect.WHITEN_ROWS + halo)
        y = x[a0:a1] - ndimage.uniform_filter(x[a0:a1], detect.PREFILTER, mode="reflect")
        var = ndimage.uniform_filter(y * y, detect.NORM_WINDOW, mode="reflect") + np.float32(1e-3)
        rows = min(detect.WHITEN_ROWS, shape[0] - r0)
        want[r0:r0 + rows] = (y / np.sqrt(var))[r0 - a0:r0 - a0 + rows]
    got = detect.whiten(luma)
    assert got.dtype == np.float32 and np.array_equal(got, want)


# ---------------------------------------------------------------- no examination can run away

def test_degenerate_basis_gives_no_points_and_no_allocation():
    # The basis seen in the field (issue 10): both vectors along the columns,
    # rows a thousandth of a pixel. Enumerating its points wanted a grid
    # 2.5 million x 1.3 million wide (94.9 TiB).
    basis = np.array([[-0.00028985679855947355, -0.001953125], [235.15484321475247, 512.0]])
    assert geometry.degenerate(basis)
    assert geometry._points(basis, 10.0, 500.0).shape == (2, 0)
    for bad in (np.full((2, 2), np.nan), np.zeros((2, 2)), np.array([[100.0, 99.9], [100.0, 100.0]])):
        assert geometry.degenerate(bad)
        assert geometry._points(bad, 10.0, 500.0).shape == (2, 0)
    assert not geometry.degenerate(TILE * np.eye(2))
    assert geometry._points(TILE * np.eye(2), 10.0, 500.0).shape[1] > 0


def test_regression_copy_resized_to_aspect_088_does_not_exhaust_memory():
    """The failing case: the demo's 3x coffee marked under this key, JPEG 95, width x0.88 (Pillow)."""
    from claimkit.demo import _picture

    seed = bytes.fromhex("364bbe1507e64803c17bb40801b4ef4b996b197b759a82027531a89ca2dfd4d3")
    copy = resize(jpeg(mark(_picture("coffee", 3), seed), 95), 0.88, 1.0)
    prep = detect.prepare(to_luma(copy))        # raised MemoryError before the fix
    for lat in prep.lattices:
        if lat is not None:
            assert not geometry.degenerate(lat.basis)
            err = lattice_error(lat.basis, true_transform(sx=0.88))
            assert abs(err[1]) < 0.01


def test_property_no_key_scale_aspect_or_turn_makes_the_search_run_away():
    """Random keys x scales 0.5-1.6 x aspects 0.85-1.15 x any turn, on four pictures.

    Whatever the copy, the search returns sound lattices (never degenerate)
    and never enumerates more than the capped grid of lattice points.
    """
    pics = {k: v for k, v in photos().items() if k in ("chelsea", "coffee", "rocket", "sky")}
    largest = []
    real = geometry._half_plane.__wrapped__

    def spy(m):
        largest.append(m)
        return real(m)

    rng = np.random.default_rng(20261202)
    original = geometry._half_plane
    geometry._half_plane = spy
    try:
        for i in range(16):
            name = sorted(pics)[i % len(pics)]
            seed = rng.bytes(32)
            marked = mark(pics[name][:360, :480], seed)
            aspect, scale, turn = rng.uniform(0.85, 1.15), rng.uniform(0.5, 1.6), rng.uniform(-180, 180)
            copy = Image.fromarray(marked).rotate(turn, resample=Image.Resampling.BICUBIC)
            w, h = copy.size
            copy = copy.resize((max(64, round(w * scale * aspect)), max(64, round(h * scale))),
                               Image.Resampling.LANCZOS)
            prep = detect.prepare(to_luma(np.asarray(copy)))
            assert all(lat is None or not geometry.degenerate(lat.basis) for lat in prep.lattices)
    finally:
        geometry._half_plane = original
    assert largest and max(largest) <= geometry.MAX_GRID_SIDE


def test_untouched_copy_is_never_resampled_whatever_the_key():
    # Issue 16: the search may return the copy's own grid with its basis
    # vectors swapped or negated; brought to the variant nearest the identity,
    # it is recognised as the unwarped hypothesis and not resampled.
    rng = np.random.default_rng(16)
    pic = photos()["coffee"]
    for _ in range(5):
        prep = detect.prepare(to_luma(mark(pic, rng.bytes(32))))
        assert prep.transforms == [None]


def test_fit_a_little_off_the_copys_own_grid_is_the_grid():
    # Issue 16: on an untouched copy of a grainy picture the least-squares fit
    # lands a few 1e-4 off the copy's own grid, up to a pixel of drift across
    # the window, and the copy was resampled for nothing. The grid itself
    # scores at least as well on the autocorrelation, so no lattice is left to
    # resample. Control: the same copy resized by 0.5 % (Pillow's Lanczos)
    # keeps a fitted lattice at that scale (there the grid scores lower).
    k = keys.format3_keys(bytes(range(1, 33)), serial=1)
    marking = EmbedKeys(sync=k["sync"], family=k["family"], family_seed=k["families"][k["family"]])
    pic = noise(lanczos(landscape(600, 800, seed=5), (1600, 1200)), 4)
    marked = jpeg(add_luma_delta(pic, scales.multiscale_delta(to_luma(pic), marking, payload(0))),
                  95, 0)
    x = detect.whiten(to_luma(marked))
    acf = geometry.lag_map(x)
    fitted = geometry._refine(acf, TILE * np.eye(2), geometry.SCALE_RANGE[0] * TILE * 0.81)[0]
    assert np.abs(fitted / TILE - np.eye(2)).max() > 5e-5       # the fit is off the grid
    assert geometry.find_lattices(x, TILE, acf=acf) == []
    assert detect.prepare(to_luma(marked)).transforms == [None]
    bigger = lanczos(marked, (1608, 1206))
    near = [lat.transform(TILE) for lat in geometry.find_lattices(detect.whiten(to_luma(bigger)), TILE)
            if np.abs(lat.transform(TILE) - np.eye(2)).max() < 0.01]
    assert near and np.allclose(np.diag(near[0]), 1.005, atol=5e-4)


def test_top_maxima_on_surfaces_narrower_than_the_block():
    # The blocks come from one padded copy (rows clamped, columns wrapped more than once when
    # the surface is narrower than the block): the reference is still scipy's maximum_filter.
    rng = np.random.default_rng(16)
    for shape, keep in (((5, 4), 2), ((3, 40), 3), ((30, 6), 4), ((1, 9), 1)):
        score = rng.normal(0, 1, shape)
        mx = ndimage.maximum_filter(score, size=(7, 7), mode=("nearest", "wrap"))
        where = np.argwhere((score == mx) & (score > 0))
        vals = score[where[:, 0], where[:, 1]]
        want = [tuple(where[i]) for i in np.argsort(vals)[::-1][:keep]]
        got = [(i, j) for i, j, _ in geometry._top_maxima(score, keep)]
        assert got == want, shape
