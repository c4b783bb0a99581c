"""Settings of the render stage (TOML table ``[render]``)."""
from __future__ import annotations

from dataclasses import dataclass

from ..errors import InputError


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
    shuffle : str
        How Blosc reorders the bytes before compressing: ``"auto"`` (bit shuffle for 16-bit
        pixels, none for 8-bit, where byte shuffle is a no-op and bit shuffle was slower and
        compressed less; see ``tests/benchmarks/bench_codec.py``), ``"bit"``, ``"byte"`` or ``"none"``.
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
    clevel: int = 1
    shuffle: str = "auto"
    reducer: str = "mean"
    interpolation: str = "linear"
    contrast: bool = False
    contrast_percentiles: tuple[float, float] = (1.0, 99.0)
    contrast_scale: int = 4


#: ``shuffle`` values -> Blosc's own names (zarr ``BloscCodec``).
SHUFFLES = {"bit": "bitshuffle", "byte": "shuffle", "none": "noshuffle"}


def blosc_shuffle(settings: RenderSettings, itemsize: int) -> str:
    """Return Blosc's shuffle name for pixels of ``itemsize`` bytes under ``settings.shuffle``."""
    if settings.shuffle == "auto":
        return "bitshuffle" if itemsize > 1 else "noshuffle"
    return SHUFFLES[settings.shuffle]


#: Reducers of the pyramid (see :mod:`stackbuild.render.reduce`).
REDUCERS = ("mean", "max", "min", "mode")
#: Interpolations of the resampling, with their spline order.
INTERPOLATIONS = {"nearest": 0, "linear": 1, "cubic": 3}


def check_settings(settings: RenderSettings) -> None:
    """Raise :class:`InputError` if render settings are out of range."""
    from zarr.codecs import BloscCname  # the codec names zarr knows; a plain enum, no I/O

    where = "[render]"
    if settings.chunk < 16 or settings.chunk % 2:
        # Even, so every shard but the last halves exactly into the level above it.
        raise InputError(f"{where} chunk must be an even number >= 16, got {settings.chunk}")
    if settings.shard < 1:
        raise InputError(f"{where} shard must be >= 1, got {settings.shard}")
    if settings.reducer not in REDUCERS:
        raise InputError(f"{where} reducer must be one of {', '.join(REDUCERS)}, got {settings.reducer!r}")
    if settings.interpolation not in INTERPOLATIONS:
        raise InputError(f"{where} interpolation must be one of {sorted(INTERPOLATIONS)}, "
                         f"got {settings.interpolation!r}")
    lo, hi = settings.contrast_percentiles
    if not 0 <= lo < hi <= 100:
        raise InputError(f"{where} contrast_percentiles must satisfy 0 <= low < high <= 100")
    if settings.contrast_scale < 1:
        raise InputError(f"{where} contrast_scale must be >= 1, got {settings.contrast_scale}")
    if not 0 <= settings.clevel <= 9:
        raise InputError(f"{where} clevel must be in 0..9, got {settings.clevel!r}")
    if settings.shuffle != "auto" and settings.shuffle not in SHUFFLES:
        raise InputError(f"{where} shuffle must be one of auto, {', '.join(SHUFFLES)}, got {settings.shuffle!r}")
    codecs = ["none", *(c.value for c in BloscCname)]
    if settings.codec not in codecs:
        raise InputError(f"{where} codec must be one of {', '.join(codecs)}, got {settings.codec!r}")
