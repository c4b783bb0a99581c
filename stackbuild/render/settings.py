"""Settings of the render stage (TOML table ``[render]``)."""
from __future__ import annotations

from dataclasses import dataclass


@dataclass
class RenderSettings:
    """How the volume is resampled and written.

    Attributes
    ----------
    chunk : int
        Chunk edge in y and x (chunks are 1 x chunk x chunk), every level.
    shard : int
        Chunks per shard edge (zarr v3 sharding codec; 1 disables sharding).
    codec : str
        Blosc compressor name: ``"zstd"``, ``"lz4"``, ``"blosclz"`` ...; ``"none"`` for raw.
    clevel : int
        Compression level.
    reducer : str
        How a level is reduced 2x2 from the one above: ``"mean"``, ``"max"``, ``"min"`` or ``"mode"``.
    interpolation : str
        ``"linear"`` (default) or ``"cubic"`` resampling of tiles.
    contrast : bool
        Normalise each section's intensity to a common robust percentile range.
    contrast_percentiles : tuple of float
        The low and high percentiles matched by ``contrast``.
    contrast_scale : int
        Reduction factor of the coarse render on which ``contrast`` measures each section's
        percentiles (larger is cheaper; block means narrow the range of fine texture).
    """

    chunk: int = 1024
    shard: int = 4
    codec: str = "zstd"
    clevel: int = 3
    reducer: str = "mean"
    interpolation: str = "linear"
    contrast: bool = False
    contrast_percentiles: tuple[float, float] = (1.0, 99.0)
    contrast_scale: int = 4
