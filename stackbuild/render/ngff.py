"""OME-Zarr 0.5 metadata of the output volume.

Pixel-centre convention
-----------------------
The physical coordinate of array index ``i`` on an axis is
``i * scale + translation`` and denotes the **centre** of that pixel, as the
OME-NGFF coordinate-transformations proposal (0.6) codifies. Level ``n`` has
x/y scale ``pixel_size * 2**n`` and translation ``(2**n - 1) / 2 * pixel_size``:
a level-``n`` pixel summarises the ``2**n x 2**n`` level-0 pixels starting at
``2**n * i``, whose centre is at level-0 index ``2**n * i + (2**n - 1) / 2``.
z is never reduced: scale = section thickness, translation 0. The aligned
frame's origin is not part of the physical frame: physical (0, 0) is the
centre of output pixel [0, 0].

Layout written here::

    volume.zarr/zarr.json          group, attributes {"ome": {"version": "0.5"}}
    volume.zarr/em/zarr.json       image group with "ome": {"version", "multiscales"}
    volume.zarr/em/<n>/            level n, dimension_names ["z", "y", "x"]

References
----------
OME-Zarr specification 0.5, https://ngff.openmicroscopy.org/0.5/ (multiscales, axes,
coordinateTransformations; arrays carry ``dimension_names`` matching the axes).
"""
from __future__ import annotations

NGFF_VERSION = "0.5"
AXES = ("z", "y", "x")


def level_transform(level: int, pixel_size_nm: float, thickness_nm: float):
    """Return ``(scale, translation)`` (z, y, x) in nanometres of one level."""
    f = 2 ** level
    px = float(pixel_size_nm) * f
    t = (f - 1) / 2.0 * float(pixel_size_nm)
    return (float(thickness_nm), px, px), (0.0, t, t)


def multiscales_attrs(name: str, n_levels: int, pixel_size_nm: float, thickness_nm: float,
                      reducer: str, extra: dict | None = None) -> dict:
    """Return the ``attributes`` of an OME-Zarr 0.5 image group with ``n_levels`` levels."""
    datasets = []
    for n in range(n_levels):
        scale, trans = level_transform(n, pixel_size_nm, thickness_nm)
        datasets.append({"path": str(n), "coordinateTransformations": [
            {"type": "scale", "scale": list(scale)},
            {"type": "translation", "translation": list(trans)}]})
    ms = {"name": name,
          "axes": [{"name": a, "type": "space", "unit": "nanometer"} for a in AXES],
          "datasets": datasets,
          "type": f"2x2 {reducer} in y and x, rounded half up; odd edges repeat the last pixel",
          "metadata": {"reducer": reducer, "pixel_centre": "index i is at i*scale + translation"}}
    attrs = {"ome": {"version": NGFF_VERSION, "multiscales": [ms]}}
    if extra:
        attrs["stackbuild"] = extra
    return attrs


def root_attrs() -> dict:
    """Return the attributes of the ``volume.zarr`` root group."""
    return {"ome": {"version": NGFF_VERSION}}
