"""Moved to :mod:`stackbuild.tiles` (layer 2: tile reading and the cache of prepared tiles).

A thin re-export for code written before the move; it will be removed.
"""
from ..tiles import (TILE_CACHE, ByteLRU, SectionTiles, block_mean, cache_bytes_for,  # noqa: F401
                     feather_weight, prepared_tile, profile_digest)
