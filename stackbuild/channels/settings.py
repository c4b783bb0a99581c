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
    max_rotation : float
        Largest expected rotation of a channel image relative to its section, degrees.
    min_measure : float
        A registration whose normalised mutual information (1 = unrelated,
        2 = identical) ends below this is flagged ``"low_mi"``.
    min_distinctness : float
        A registration whose best start stands out from the other searched
        positions by less than this robust z-score is flagged ``"ambiguous"``
        (the value is a rule of thumb set on the synthetic sample, no source).
    """

    model: str = "similarity"
    bins: int = 32
    max_offset: float = 200.0
    max_rotation: float = 5.0
    min_measure: float = 1.02
    min_distinctness: float = 6.0
