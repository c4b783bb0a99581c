"""stackbuild.tiffhead against tifffile (the reference reader): the same offset, shape and type for every
plain file tifffile writes, and "don't know" for every other layout.

Files are written by tifffile itself (classic and BigTIFF, both byte orders, one strip and many,
ImageJ and OME flavours, compressed, tiled, RGB); the pixels come from ``skimage.data.camera``.
"""
import numpy as np
import pytest
import tifffile
from skimage import data

from stackbuild.tiffhead import plain_layout
from stackbuild.tiles import read_tile

CAMERA = data.camera()[:200, :300]


def _reference(path):
    """Return tifffile's (offset, shape, dtype) of page 0 when its pixels lie in one uncompressed run."""
    with tifffile.TiffFile(path) as tf:
        page = tf.pages[0]
        if page.compression != 1 or page.is_tiled or page.ndim != 2 or page.is_contiguous is None:
            return None
        return int(page.dataoffsets[0]), tuple(page.shape), np.dtype(tf.byteorder + page.dtype.str[1:])


PLAIN = {
    "uint8": dict(data=CAMERA),
    "uint16": dict(data=CAMERA.astype(np.uint16) * 16),
    "int16": dict(data=CAMERA.astype(np.int16) - 100),
    "float32": dict(data=CAMERA.astype(np.float32) / 255),
    "big-endian uint16": dict(data=CAMERA.astype(np.uint16) * 16, byteorder=">"),
    "bigtiff": dict(data=CAMERA.astype(np.uint16), bigtiff=True),
    "many strips": dict(data=CAMERA.astype(np.uint16), rowsperstrip=16),
    "imagej": dict(data=CAMERA.astype(np.uint16), imagej=True),
    "ome": dict(data=CAMERA.astype(np.uint16), ome=True),
    "two pages": dict(data=np.stack([CAMERA, CAMERA[::-1]])),
}


def _written(folder, flavour: dict):
    """Return the path of a TIFF tifffile wrote from ``flavour`` (its ``data`` and ``imwrite`` options)."""
    kw = dict(flavour)
    path = folder / "t.tif"
    tifffile.imwrite(path, kw.pop("data"), **kw)
    return path


@pytest.mark.parametrize("name", sorted(PLAIN))
def test_plain_files_give_tifffiles_layout_and_pixels(tmp_path, name):
    path = _written(tmp_path, PLAIN[name])
    got = plain_layout(str(path))
    assert got is not None, name
    assert got == _reference(path)
    offset, shape, dt = got
    pixels = np.fromfile(path, dtype=dt, count=shape[0] * shape[1], offset=offset).reshape(shape)
    np.testing.assert_array_equal(pixels, tifffile.imread(path, key=0))
    # and the project's reader, which takes this path, returns tifffile's pixels in native order
    back = read_tile(path, *shape)
    np.testing.assert_array_equal(back, tifffile.imread(path, key=0))
    assert back.dtype.isnative


OTHER = {
    "zlib": dict(data=CAMERA, compression="zlib"),
    "lzw": dict(data=CAMERA.astype(np.uint16), compression="lzw"),
    "predictor": dict(data=CAMERA.astype(np.uint16), compression="zlib", predictor=True),
    "tiled": dict(data=CAMERA.astype(np.uint16), tile=(64, 64)),
    "rgb": dict(data=np.stack([CAMERA] * 3, axis=-1), photometric="rgb"),
}


@pytest.mark.parametrize("name", sorted(OTHER))
def test_other_layouts_are_left_to_tifffile(tmp_path, name):
    assert plain_layout(str(_written(tmp_path, OTHER[name]))) is None


def test_not_a_tiff_or_cut_short_is_dont_know(tmp_path):
    path = tmp_path / "t.tif"
    path.write_bytes(b"not a tiff at all")
    assert plain_layout(str(path)) is None
    tifffile.imwrite(path, CAMERA)
    path.write_bytes(path.read_bytes()[:20])        # the header points past the end
    assert plain_layout(str(path)) is None
    assert plain_layout(str(tmp_path / "missing.tif")) is None
