"""stackbuild: serial-section EM tiles -> registered, multiscale, chunked OME-Zarr volume."""
from ._version import __version__


def open_volume(build_dir, level: int = 0, lazy: bool = True, channel: str | None = None):
    """Return the aligned volume of a build folder as a dask array (z, y, x).

    See :func:`stackbuild.render.lazy.open_volume`.
    """
    from .render.lazy import open_volume as _open

    return _open(build_dir, level=level, lazy=lazy, channel=channel)
