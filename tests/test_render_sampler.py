"""The sampler and reducers against reference libraries (scikit-image, OpenCV, SciPy) and ground truth."""
from __future__ import annotations

import cv2
import numpy as np
import pytest
import tifffile
import zarr
from scipy import ndimage, stats
from skimage import data, measure, transform

from stackbuild import tiles as tiles_mod
from stackbuild.errors import InputError
from stackbuild.render.reduce import reduce2x2
from stackbuild.sampler import render_region as sample_region
from stackbuild.render.settings import RenderSettings
from stackbuild.transforms import Affine2D, DisplacementField, SectionAlignment, SectionStitch, TilePlacement

from render_builders import foam, make_build


def render_region(stitch, *args, **kw):
    """The sampler, with the section's tiles read from their files through the cache."""
    return sample_region(stitch, *args, tiles=tiles_mod.SectionTiles(stitch), **kw)


def _one_tile(tmp_path, img, x=0.0, y=0.0, gain=1.0, offset=0.0, illumination=None):
    path = tmp_path / "tile.tif"
    tifffile.imwrite(path, img)
    t = TilePlacement("t", str(path), img.shape[1], img.shape[0], x, y, x, y, gain=gain, offset=offset)
    return SectionStitch(0, img.dtype.name, [t], illumination=illumination)


@pytest.fixture
def camera():
    # Data shipped with scikit-image (skimage.data.camera), smoothed so that OpenCV's 1/32-pixel
    # fixed-point bilinear weights (OpenCV docs, INTER_BITS = 5; from memory) stay below a grey level.
    return np.round(ndimage.gaussian_filter(data.camera()[:256, :256].astype(np.float64), 2.0)).astype(np.uint8)


def _skimage_bilinear(image: np.ndarray, pull: Affine2D):
    """Return ``skimage.transform.warp`` of ``image`` through ``pull`` (order 1) and the mask of
    output pixels whose source lies at least one pixel inside the image."""
    ref = transform.warp(image.astype(np.float64), transform.AffineTransform(matrix=pull.homogeneous),
                         order=1, preserve_range=True)
    h, w = image.shape
    yy, xx = np.mgrid[:h, :w]
    src = pull.apply(np.column_stack([xx.ravel(), yy.ravel()])).reshape(h, w, 2)
    inside = (src[..., 0] > 1) & (src[..., 0] < w - 2) & (src[..., 1] > 1) & (src[..., 1] < h - 2)
    return ref, inside


def test_affine_resampling_matches_skimage_warp(tmp_path, camera):
    stitch = _one_tile(tmp_path, camera)
    pull = Affine2D.similarity(0.9, 0.3, tx=20.0, ty=-15.0, center=(128, 128))  # aligned -> section
    ours = render_region(stitch, SectionAlignment(0, pull), 0, 0, 256, 256, order=1)
    # Reference: skimage.transform.warp with the same inverse map and order=1 (bilinear).
    ref, inside = _skimage_bilinear(camera, pull)
    assert inside.mean() > 0.5
    assert np.abs(ours[inside] - ref[inside]).max() <= 1.0


def test_cubic_resampling_matches_opencv_warp_affine(tmp_path, camera):
    stitch = _one_tile(tmp_path, camera)
    pull = Affine2D.similarity(1.1, -0.2, tx=-6.0, ty=9.0, center=(128, 128))
    ours = render_region(stitch, SectionAlignment(0, pull), 0, 0, 256, 256, order=3)
    # Reference: OpenCV warpAffine, cubic convolution, given the pull-back (inverse) map.
    ref = cv2.warpAffine(camera.astype(np.float32), pull.matrix, (256, 256),
                         flags=cv2.INTER_CUBIC | cv2.WARP_INVERSE_MAP)
    yy, xx = np.mgrid[:256, :256]
    src = pull.apply(np.column_stack([xx.ravel(), yy.ravel()])).reshape(256, 256, 2)
    inside = (src[..., 0] > 2) & (src[..., 0] < 253) & (src[..., 1] > 2) & (src[..., 1] < 253)
    assert np.abs(ours[inside] - ref[inside]).max() <= 0.5


def test_elastic_field_matches_scipy_map_coordinates(tmp_path, camera):
    stitch = _one_tile(tmp_path, camera)
    gy, gx = np.mgrid[:9, :9].astype(np.float32)
    vec = np.stack([3 * np.sin(gx / 3), 2 * np.cos(gy / 2)], axis=-1)
    field = DisplacementField(vec, origin=(0.0, 0.0), spacing=32.0)
    pull = Affine2D.translation(4.0, -3.0)
    ours = render_region(stitch, SectionAlignment(0, pull, field), 0, 0, 256, 256)
    yy, xx = np.mgrid[:256, :256]
    src = pull.apply(field.apply(np.column_stack([xx.ravel(), yy.ravel()])))
    # Reference: scipy.ndimage.map_coordinates, order=1, at the positions the stored chain gives.
    ref = ndimage.map_coordinates(camera.astype(np.float64), [src[:, 1], src[:, 0]], order=1).reshape(256, 256)
    s = src.reshape(256, 256, 2)
    inside = (s[..., 0] > 1) & (s[..., 0] < 254) & (s[..., 1] > 1) & (s[..., 1] < 254)
    assert np.abs(ours[inside] - ref[inside]).max() <= 1.0


def test_intensity_correction_is_gain_times_raw_over_illumination_plus_offset(tmp_path):
    raw = foam(48, 40, seed=3)
    stitch = _one_tile(tmp_path, raw, gain=1.5, offset=3.0, illumination=np.full((4, 4), 2.0, np.float32))
    tiles_mod.TILE_CACHE.clear()
    out = render_region(stitch, None, 0, 0, 40, 48)
    # Ground truth: the correction written out (the profile is constant, so its upsampling is too).
    np.testing.assert_allclose(out, 1.5 * raw / 2.0 + 3.0, rtol=1e-5)


def test_overlapping_tiles_blend_back_to_the_mosaic(tmp_path):
    folder = make_build(tmp_path, n_sections=1, grid=(3, 3), tile=(48, 48), overlap=12)
    stitch = folder.store.load_stitch(0)
    out, weight = render_region(stitch, None, -3, -2, 110, 112, return_weight=True)
    mosaic = foam(120, 120, seed=100)
    # Ground truth: tiles cut from one mosaic at exact positions must blend back to it.
    np.testing.assert_allclose(out[2:, 3:], mosaic[:110, :107], atol=1e-3)
    assert not weight[:2].any() and not weight[:, :3].any()


def test_reduced_render_is_the_block_mean(tmp_path):
    folder = make_build(tmp_path, n_sections=1, grid=(3, 3), tile=(48, 48), overlap=12)
    stitch = folder.store.load_stitch(0)
    out = render_region(stitch, None, 0, 0, 30, 30, scale=4)
    mosaic = foam(120, 120, seed=100).astype(np.float64)
    # Reference: skimage.transform.downscale_local_mean of the full-resolution mosaic.
    np.testing.assert_allclose(out, transform.downscale_local_mean(mosaic, (4, 4)), atol=1e-3)


def test_only_tiles_meeting_the_region_are_read(tmp_path):
    folder = make_build(tmp_path, n_sections=1, grid=(3, 3), tile=(48, 48), overlap=12)
    stitch = folder.store.load_stitch(0)
    tiles_mod.PIXELS_READ.clear()
    render_region(stitch, None, 2, 2, 20, 20)
    # An uncompressed tile is read by window: only the one tile, and only about the region's pixels.
    assert set(tiles_mod.PIXELS_READ) == {str(stitch.tiles[0].path)}
    assert tiles_mod.PIXELS_READ[str(stitch.tiles[0].path)] <= 27 * 27 < 48 * 48
    # A compressed tile in one strip cannot be read by window: it is decoded whole once, then its
    # raw pixels are served from the cache of decoded segments.
    folder = make_build(tmp_path / "z", n_sections=1, grid=(3, 3), tile=(48, 48), overlap=12,
                        tiff_kwargs={"compression": "zlib"})
    stitch = folder.store.load_stitch(0)
    tiles_mod.SEGMENT_CACHE.clear()
    tiles_mod.PIXELS_READ.clear()
    render_region(stitch, None, 2, 2, 20, 20)
    assert dict(tiles_mod.PIXELS_READ) == {str(stitch.tiles[0].path): 48 * 48}
    render_region(stitch, None, 2, 2, 20, 20)  # served from the cache
    assert dict(tiles_mod.PIXELS_READ) == {str(stitch.tiles[0].path): 48 * 48}


@pytest.mark.parametrize("layout", [dict(compression="zlib", rowsperstrip=16),
                                    dict(compression="lzw", tile=(32, 48), byteorder=">"),
                                    dict(compression="zlib", predictor=True, rowsperstrip=20)])
def test_compressed_tiles_in_strips_or_tiles_are_read_by_segment(tmp_path, layout):
    # Reference: tifffile.imread of the whole file. A window of a compressed tile stored in
    # several strips (or TIFF tiles) decodes only the segments under it, once per process.
    img = (foam(120, 150, seed=3, dtype=np.uint16)).astype(np.uint16)
    path = tmp_path / "t.tif"
    tifffile.imwrite(path, img, **layout)
    want = tifffile.imread(path)
    tiles_mod.PIXELS_READ.clear()
    tiles_mod.SEGMENT_CACHE.clear()
    got = tiles_mod.read_window(path, 120, 150, (30, 61), (10, 40), dtype="uint16")
    assert got.dtype == np.dtype("uint16") and np.array_equal(got, want[30:61, 10:40])
    with tifffile.TiffFile(path) as tf:
        sh, sw = tf.pages[0].chunks
    rows = -(-61 // sh) - 30 // sh
    cols = -(-40 // sw) - 10 // sw
    decoded = sum(tiles_mod.PIXELS_READ.values())
    assert decoded == rows * sh * min(cols * sw, 150) < 120 * 150
    # a neighbouring window in the same segments decodes nothing more
    got = tiles_mod.read_window(path, 120, 150, (33, 58), (12, 39), dtype="uint16")
    assert np.array_equal(got, want[33:58, 12:39]) and sum(tiles_mod.PIXELS_READ.values()) == decoded
    # the recorded size is still checked, naming the file
    with pytest.raises(InputError, match="t.tif|shape"):
        tiles_mod.read_window(path, 121, 150, (0, 5), (0, 5))


class _WholeTiles:
    """A provider that always hands over whole prepared tiles (no ``windows``): the sampler's other path."""

    def __init__(self, stitch):
        self.inner = tiles_mod.SectionTiles(stitch)

    def __call__(self, tile, scale):
        return self.inner(tile, scale)


@pytest.mark.parametrize("elastic", [False, True])
@pytest.mark.parametrize("order", [1, 3])
def test_windows_give_the_same_pixels_as_whole_tiles(tmp_path, camera, elastic, order):
    stitch = _camera_mosaic(tmp_path, camera)
    stitch.illumination = np.array([[0.9, 1.0, 1.1], [1.05, 0.95, 1.0]], np.float32)
    pull = Affine2D.similarity(1.01, 0.04, tx=5.0, ty=-3.0, center=(128, 128))
    field = None
    if elastic:
        yy, xx = np.mgrid[0:9, 0:9].astype(np.float32)
        vec = np.stack([1.5 * np.sin(xx / 3.0), 1.2 * np.cos(yy / 4.0)], -1).astype(np.float32)
        field = DisplacementField(vec, origin=(0.0, 0.0), spacing=32.0)
    alignment = SectionAlignment(0, pull, field)
    for x0, y0, n in [(0, 0, 256), (37, 61, 90), (150, 3, 64)]:
        tiles_mod.TILE_CACHE.clear()
        whole = sample_region(stitch, alignment, x0, y0, n, n, order=order, tiles=_WholeTiles(stitch))
        tiles_mod.PIXELS_READ.clear()
        part = sample_region(stitch, alignment, x0, y0, n, n, order=order, tiles=tiles_mod.SectionTiles(stitch))
        assert sum(tiles_mod.PIXELS_READ.values()) > 0  # windows were read (not the cached whole tiles)
        # Same warp of the same pixels; only the map's float rounding differs (OpenCV's 1/32-pixel grid).
        np.testing.assert_allclose(part, whole, atol=0.5 if elastic else 1e-3)
        assert np.mean(np.abs(part - whole)) < 1e-2


def test_tile_cache_is_bounded_in_bytes():
    cache = tiles_mod.ByteLRU(1000)
    for k in range(5):
        cache.put(k, np.zeros(300, np.uint8))
    assert cache.nbytes <= 1000 and cache.get(0) is None and cache.get(4) is not None


def test_point_lands_on_the_same_physical_spot_at_every_level(tmp_path):
    def content(s, h, w):
        img = np.full((h, w), 10, np.uint8)
        img[45:50, 37:44] = 250  # a bright 7 x 5 block, not aligned to any power of two
        return img

    settings = RenderSettings(chunk=16, shard=1)
    folder = make_build(tmp_path, n_sections=1, grid=(2, 2), tile=(64, 64), overlap=8,
                        settings=settings, content=content)
    from stackbuild.render.write import render_volume
    facts = render_volume(folder.root, settings)
    assert len(facts["levels"]) >= 4
    canvas = folder.store.load_canvas()  # a fresh canvas has a margin: the block is at aligned (40, 47)
    ms = zarr.open_group(str(folder.volume_path / "em"), mode="r").attrs["ome"]["multiscales"][0]
    centres = []
    for ds in ms["datasets"]:
        img = zarr.open_array(str(folder.volume_path / "em" / ds["path"]), mode="r")[0].astype(np.float64) - 10
        scale, trans = (t[k] for t, k in zip(ds["coordinateTransformations"], ("scale", "translation")))
        yy, xx = np.mgrid[:img.shape[0], :img.shape[1]]
        # Only pixels whose whole footprint lies on the tiles (aligned 0..100): the canvas margin
        # around them (no tile: 0) must not weigh in.
        ax, ay = (xx * scale[2] + trans[2]) / 4.0 + canvas.origin_x, (yy * scale[1] + trans[1]) / 4.0 + canvas.origin_y
        half = scale[2] / 8.0
        img = np.where((ax - half >= 0) & (ax + half <= 100) & (ay - half >= 0) & (ay + half <= 100), img, 0.0)
        # OME-NGFF: physical = index * scale + translation (index = pixel centre).
        centres.append((np.sum(img * (xx * scale[2] + trans[2])) / img.sum(),
                        np.sum(img * (yy * scale[1] + trans[1])) / img.sum()))
    centres = np.array(centres) / 4.0  # in level-0 pixels
    np.testing.assert_allclose(centres[0], (40.0 - canvas.origin_x, 47.0 - canvas.origin_y), atol=1e-9)
    # Agreement to a tenth of each level's pixel (rounding to integers moves the centroid a
    # little); a translation of 0 instead of (2**n - 1)/2 would be off by 0.5, 1.5, 3.5 pixels.
    tol = 0.1 * 2.0 ** np.arange(len(centres))
    assert np.all(np.abs(centres - centres[0]).max(axis=1) < tol), centres


@pytest.mark.parametrize("how, ref", [("max", np.max), ("min", np.min)])
def test_extreme_reducers_match_skimage_block_reduce(how, ref):
    rng = np.random.default_rng(1)
    img = rng.integers(0, 65535, (1, 18, 22), dtype=np.uint16)
    # Reference: skimage.measure.block_reduce (even sizes, so its padding plays no part).
    np.testing.assert_array_equal(reduce2x2(img, how), measure.block_reduce(img, (1, 2, 2), ref))


def test_mode_reducer_matches_scipy_mode():
    rng = np.random.default_rng(2)
    img = rng.integers(0, 4, (1, 20, 20), dtype=np.uint8)
    quads = img.reshape(1, 10, 2, 10, 2).transpose(0, 1, 3, 2, 4).reshape(1, 10, 10, 4)
    # Reference: scipy.stats.mode, which returns the smallest of tied values (SciPy docs).
    np.testing.assert_array_equal(reduce2x2(img, "mode"), stats.mode(quads, axis=-1).mode)


def test_bad_arguments_are_refused(tmp_path, camera):
    stitch = _one_tile(tmp_path, camera)
    with pytest.raises(ValueError, match="scale"):
        render_region(stitch, None, 0, 0, 8, 8, scale=0)
    with pytest.raises(ValueError, match="order"):
        render_region(stitch, None, 0, 0, 8, 8, order=2)
    with pytest.raises(ValueError, match="reducer"):
        reduce2x2(np.zeros((2, 2), np.uint8), "median")


def test_illumination_profile_is_upsampled_bilinearly_before_dividing(tmp_path):
    raw = foam(48, 40, seed=4)
    profile = np.array([[0.8, 1.0, 1.2], [1.1, 0.9, 1.3]], np.float32)
    stitch = _one_tile(tmp_path, raw, illumination=profile)
    tiles_mod.TILE_CACHE.clear()
    out = render_region(stitch, None, 0, 0, 40, 48)
    # Reference: OpenCV's bilinear resize of the profile to the tile size (the stitching stage's rule).
    expect = raw / cv2.resize(profile, (40, 48), interpolation=cv2.INTER_LINEAR)
    np.testing.assert_allclose(out, expect, rtol=1e-5)


def _camera_mosaic(tmp_path, camera, tile=96, overlap=16):
    """Cut ``camera`` into a 3 x 3 grid of overlapping tiles at their exact positions."""
    step = tile - overlap
    tiles = []
    for i in range(3):
        for j in range(3):
            path = tmp_path / f"cam_{i}{j}.tif"
            tifffile.imwrite(path, camera[i * step:i * step + tile, j * step:j * step + tile])
            x, y = j * step, i * step
            tiles.append(TilePlacement(f"c{i}{j}", str(path), tile, tile, x, y, x, y))
    return SectionStitch(0, "uint8", tiles)


def test_single_tile_shortcut_rectangles_lie_inside_their_tile_and_outside_every_other_footprint(
        tmp_path, camera):
    from stackbuild.sampler import exclusive_boxes, tile_footprints
    stitch = _camera_mosaic(tmp_path, camera)
    alignment = SectionAlignment(0, Affine2D.similarity(1.0, 0.05, tx=3.0, ty=-2.0, center=(128, 128)))
    boxes = tile_footprints(stitch, alignment)
    only = exclusive_boxes(stitch, alignment, boxes)
    assert only[4] is not None  # the middle tile has a shortcut (else the checks below prove nothing)
    # Ground truth by geometry: map each rectangle's corners to the section frame and test them.
    for i, r in only.items():
        if r is None:
            continue
        t = stitch.tiles[i]
        corners = np.array([[r[0], r[1]], [r[2], r[1]], [r[0], r[3]], [r[2], r[3]]])
        sec = alignment.affine.apply(corners)
        assert np.all(sec >= [t.x + 1, t.y + 1]) and np.all(sec <= [t.x + t.width - 2, t.y + t.height - 2])
        for k, b in enumerate(boxes):
            if k != i:
                assert b[0] > r[2] or b[2] < r[0] or b[1] > r[3] or b[3] < r[1]


def test_blended_mosaic_with_the_shortcut_matches_skimage_warp_of_the_whole_image(tmp_path, camera):
    stitch = _camera_mosaic(tmp_path, camera)
    pull = Affine2D.similarity(1.0, 0.05, tx=3.0, ty=-2.0, center=(128, 128))  # aligned -> section
    ours = render_region(stitch, SectionAlignment(0, pull), 0, 0, 256, 256, order=1)
    # Reference: skimage.transform.warp of the uncut image (scikit-image's bundled camera), bilinear;
    # tiles cut from one image at exact positions blend back to it, within OpenCV's 1/32-pixel
    # quantisation (one grey level, as in the single-tile test above).
    ref, inside = _skimage_bilinear(camera, pull)
    assert inside.mean() > 0.8
    assert np.abs(ours[inside] - ref[inside]).max() <= 1.0
    # The weight-returning path blends every pixel; both give the same values (float rounding apart).
    full, _ = render_region(stitch, SectionAlignment(0, pull), 0, 0, 256, 256, order=1, return_weight=True)
    np.testing.assert_allclose(ours[inside], full[inside], atol=1e-3)


def test_elastic_mosaic_with_the_shortcut_matches_scipy_map_coordinates_of_the_whole_image(tmp_path, camera):
    from stackbuild.sampler import exclusive_boxes, tile_footprints
    stitch = _camera_mosaic(tmp_path, camera)
    gy, gx = np.mgrid[:9, :9].astype(np.float32)
    field = DisplacementField(np.stack([2 * np.sin(gx / 3), 1.5 * np.cos(gy / 2)], axis=-1),
                              origin=(0.0, 0.0), spacing=32.0)
    pull = Affine2D.similarity(1.0, 0.05, tx=3.0, ty=-2.0, center=(128, 128))  # aligned -> coarse -> section
    alignment = SectionAlignment(0, pull, field)
    only = exclusive_boxes(stitch, alignment, tile_footprints(stitch, alignment))
    assert only[4] is not None  # the middle tile has a shortcut (else the checks below prove nothing)
    # Ground truth by geometry: every pixel centre of a shortcut rectangle lands, through the
    # stored chain, inside its own tile and inside no other tile.
    for i, r in only.items():
        if r is None:
            continue
        xx, yy = np.meshgrid(np.arange(np.ceil(r[0]), np.floor(r[2]) + 1), np.arange(np.ceil(r[1]), np.floor(r[3]) + 1))
        sec = pull.apply(field.apply(np.column_stack([xx.ravel(), yy.ravel()])))
        for k, t in enumerate(stitch.tiles):
            inside = ((sec[:, 0] >= t.x - 0.5) & (sec[:, 0] <= t.x + t.width - 0.5)
                      & (sec[:, 1] >= t.y - 0.5) & (sec[:, 1] <= t.y + t.height - 0.5))
            assert inside.all() if k == i else not inside.any()
    ours = render_region(stitch, alignment, 0, 0, 256, 256, order=1)
    yy, xx = np.mgrid[:256, :256]
    src = pull.apply(field.apply(np.column_stack([xx.ravel(), yy.ravel()])))
    # Reference: scipy.ndimage.map_coordinates (order 1) of the uncut image at the positions the
    # stored chain gives; tiles cut from one image blend back to it, within OpenCV's 1/32-pixel
    # quantisation (one grey level, as in the single-tile elastic test above).
    ref = ndimage.map_coordinates(camera.astype(np.float64), [src[:, 1], src[:, 0]], order=1).reshape(256, 256)
    s = src.reshape(256, 256, 2)
    inside = (s[..., 0] > 1) & (s[..., 0] < 254) & (s[..., 1] > 1) & (s[..., 1] < 254)
    assert inside.mean() > 0.8
    assert np.abs(ours[inside] - ref[inside]).max() <= 1.0
    # The weight-returning path blends every pixel; both give the same values (float rounding apart).
    full, _ = render_region(stitch, alignment, 0, 0, 256, 256, order=1, return_weight=True)
    np.testing.assert_allclose(ours, full, atol=1e-3)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16])
def test_mean_reducer_matches_skimage_block_reduce_rounded_half_up(dtype):
    rng = np.random.default_rng(3)
    top = np.iinfo(dtype).max
    img = rng.integers(0, top, (2, 18, 22), dtype=dtype, endpoint=True)
    img[0, :4, :4] = top  # the largest sums: no overflow in the narrow accumulator
    # Reference: skimage.measure.block_reduce with np.mean (even sizes), rounded half up.
    ref = np.floor(measure.block_reduce(img.astype(np.float64), (1, 2, 2), np.mean) + 0.5)
    np.testing.assert_array_equal(reduce2x2(img, "mean"), ref.astype(dtype))
    # Odd sizes: the last row and column repeat (numpy.pad mode "edge" as the reference).
    odd = img[:, :17, :21]
    padded = np.pad(odd.astype(np.float64), [(0, 0), (0, 1), (0, 1)], mode="edge")
    ref = np.floor(measure.block_reduce(padded, (1, 2, 2), np.mean) + 0.5)
    np.testing.assert_array_equal(reduce2x2(odd, "mean"), ref.astype(dtype))
