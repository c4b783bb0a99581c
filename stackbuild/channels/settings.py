"""Settings of the channel stage (TOML table ``[channels]``)."""
from __future__ import annotations

from dataclasses import dataclass

from ..errors import InputError


@dataclass
class ChannelSettings:
    """How molecular marker images are registered to the EM and rendered.

    Attributes
    ----------
    model : str
        ``"rigid"``, ``"similarity"`` or ``"affine"``: the channel-to-section model.
    bins : int
        Histogram bins of the mutual-information measure (few, as feature
        images are sparse: 16 was better than 32 on the synthetic sample).
    max_offset : float
        Largest expected error of the approximate channel position, section
        pixels (the search range: keep it near the real placement uncertainty,
        since a wider range only adds chances of a spurious optimum). A
        registration whose optimum lies at the edge of this range is rejected
        (flag ``"at_search_limit"``).
    max_rotation : float
        Largest expected rotation of a channel image relative to its section, degrees.
    min_measure : float
        A registration whose normalised mutual information (1 = unrelated,
        2 = identical) ends below this is rejected (flag ``"low_mi"``): its
        section's record says ``registered: false`` and why, and no
        transform is stored for it.
    min_gain : float
        A registration whose best searched placement shares less than this
        much more normalised mutual information than the search's median (a
        chance placement of the same images) is rejected (flag ``"low_mi"``).
        Unlike ``min_measure`` this does not depend on how much two feature
        images share by chance (smooth images share more). Rule of thumb, no
        source: on the synthetic families correct registrations gained
        0.0063-0.034, chance optima of unrelated feature pairs 0.0014-0.0053
        and a marker of pure noise 0.0026.
    max_scale_change : float
        A registration whose scale differs from the pixel-size ratio by more
        than this fraction (either axis, for the affine model) is rejected
        (flag ``"wild_scale"``). Rule of thumb, no source: a microscope's
        pixel size is known to about a percent (from memory), and on the
        synthetic families (true scale = the ratio) correct registrations
        stayed within 1.2 % while spurious optima, and a punctate marker's
        smooth density map on small sections, drifted 2.6-4.4 % (the search
        allows 10 %).
    min_distinctness : float
        A registration whose best start stands out from the other searched
        positions by less than this robust z-score is flagged ``"ambiguous"``
        (the value is a rule of thumb set on the synthetic sample, no source:
        there a membrane-edge match scored 17-38 and sparse puncta 3-7, the
        latter with errors up to about 2 marker pixels).
    feature : str
        What is registered: ``"edges"`` (EM membrane map against the marker's
        gradient magnitude, for a marker filling some cells), ``"density"``
        (EM vesicle density against the smoothed marker, for a punctate
        marker), ``"intensity"`` (raw intensities), or ``"auto"``: try
        ``"edges"`` and ``"density"`` and keep the one whose best placement
        gains the most mutual information over a chance placement, among
        those not rejected.
    feature_scale : int
        EM features are computed on pixels this many times finer than the
        channel's render scale (then reduced to the channel grid), so thin
        membranes and small vesicles are still resolved.
    membrane_px : float
        Membrane half-width, full-resolution EM pixels (``"edges"``).
    vesicle_px : float
        Vesicle radius, full-resolution EM pixels (``"density"``).
    cluster_px : float
        Gaussian sigma, full-resolution EM pixels, over which the vesicle
        response is pooled into a density (about a vesicle cluster's size).
    """

    model: str = "similarity"
    bins: int = 16
    max_offset: float = 64.0
    max_rotation: float = 5.0
    min_measure: float = 1.005
    min_gain: float = 0.005
    max_scale_change: float = 0.02
    min_distinctness: float = 8.0
    feature: str = "auto"
    feature_scale: int = 4
    membrane_px: float = 1.3
    vesicle_px: float = 3.5
    cluster_px: float = 20.0


#: Channel -> section models of the mutual-information registration.
MODELS = ("rigid", "similarity", "affine")
#: EM feature maps a marker can be compared with.
KINDS = ("intensity", "edges", "density")
#: Values of ``feature``: a kind, or ``"auto"`` (try the kinds of :data:`AUTO_KINDS`).
FEATURES = ("auto",) + KINDS
AUTO_KINDS = ("edges", "density")


def check_settings(settings: ChannelSettings) -> None:
    """Raise :class:`InputError` if channel settings are out of range."""
    where = "[channels]"
    if settings.model not in MODELS:
        raise InputError(f"{where} model must be one of {', '.join(MODELS)}, got {settings.model!r}")
    if not 4 <= settings.bins <= 256:
        raise InputError(f"{where} bins must be in 4..256, got {settings.bins}")
    if settings.max_offset < 0 or settings.max_rotation < 0:
        raise InputError(f"{where} max_offset and max_rotation must be >= 0")
    if not 0 <= settings.min_gain < 1:
        raise InputError(f"{where} min_gain must be in [0, 1), got {settings.min_gain}")
    if not 0 < settings.max_scale_change < 1:
        raise InputError(f"{where} max_scale_change must be in (0, 1), got {settings.max_scale_change}")
    if settings.feature not in FEATURES:
        raise InputError(f"{where} feature must be one of {', '.join(FEATURES)}, got {settings.feature!r}")
    if settings.feature_scale < 1:
        raise InputError(f"{where} feature_scale must be >= 1, got {settings.feature_scale}")
    if min(settings.membrane_px, settings.vesicle_px) <= 0 or settings.cluster_px < 0:
        raise InputError(f"{where} membrane_px and vesicle_px must be > 0 and cluster_px >= 0")
