"""stackbuild: serial-section EM tiles -> registered, multiscale, chunked OME-Zarr volume."""
from ._version import __version__


def open_volume(build_dir, level: int = 0, lazy: bool = True, channel: str | None = None):
    """Return the aligned volume of a build folder as a dask array (z, y, x).

    See :func:`stackbuild.render.lazy.open_volume`.
    """
    from .render.lazy import open_volume as _open

    return _open(build_dir, level=level, lazy=lazy, channel=channel)


def locate(build_dir, points: list[dict], source: str = "volume", *, nm: bool = False,
           from_version: int | None = None, to_version: int | None = None) -> list[dict]:
    """Return points in volume, raw tile and stage coordinates, with flags (and across transform versions).

    See :func:`stackbuild.run.locate.locate_points`.
    """
    from .run.locate import locate_points

    return locate_points(build_dir, points, source, nm=nm, from_version=from_version, to_version=to_version)
