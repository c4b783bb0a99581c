"""Reading raw tile pixels: the one place every stage decodes a tile.

Tiles are only ever read. Headers were checked when the manifest was read
(:func:`stackbuild.manifest.image_header`); here the decoded pixels are
checked against what was recorded, so a file that changed or broke since
then is named instead of silently rendered.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import tifffile

from .errors import InputError


def read_tile(path: str | Path, height: int, width: int, section: int | None = None, *,
              dtype: str | None = None, what: str = "tile", source: str = "stitch record") -> np.ndarray:
    """Return the pixels of one tile (its first TIFF page), checked against the recorded size and type.

    Parameters
    ----------
    path : str or Path
        The tile image.
    height, width : int
        The size recorded for it (manifest header or stitch record).
    section : int, optional
        Its section, for the error message.
    dtype : str, optional
        The pixel type recorded for it (``"u1"`` or ``"uint8"`` alike); not checked if None.
    what : str
        How the tile is named in messages (e.g. ``"tile 'r0c1' (manifest line 4)"``).
    source : str
        Where the recorded size came from, for messages (``"header"``, ``"stitch record"``).

    Raises
    ------
    InputError
        Naming the file when it is missing, cannot be decoded, or does not
        have the recorded shape or type.
    """
    try:
        img = tifffile.imread(path, key=0)
    except Exception as exc:  # tifffile and the codecs raise many exception types
        raise InputError(f"cannot read the pixels of {what}: {type(exc).__name__}: {exc}",
                         file=path, section=section) from None
    kind = img.dtype.str.lstrip("<>|=")
    if img.shape != (height, width) or (dtype is not None and img.dtype != np.dtype(dtype)):
        expected = f"({height}, {width})" + (f" {dtype}" if dtype is not None else "")
        raise InputError(f"{what} has shape {img.shape} {kind}, but its {source} said {expected}",
                         file=path, section=section)
    return img
