"""Settings of the channel stage (TOML table ``[channels]``)."""
from __future__ import annotations

from dataclasses import dataclass


@dataclass
class ChannelSettings:
    """How molecular marker images are registered to the EM and rendered.

    Attributes
    ----------
    model : str
        ``"rigid"``, ``"similarity"`` or ``"affine"``: the channel-to-section model.
    bins : int
        Histogram bins of the mutual-information measure.
    max_offset : float
        Largest expected error of the approximate channel position, section pixels.
    """

    model: str = "similarity"
    bins: int = 32
    max_offset: float = 200.0
