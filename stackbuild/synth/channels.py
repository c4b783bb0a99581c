"""Marker-channel images: low-resolution light-microscopy views of the same section.

Each marker image has pixels ``binning`` times the EM pixel; its pixel ``c``
(x, y) shows section point ``q = R(phi) (b c + (b - 1) / 2 - centre) + centre + t``
(a similarity: scale ``b``, unknown rotation ``phi`` about the section centre
and unknown shift ``t``). The map is stored as an affine channel -> section.
Nominally (as the channel manifest reports) it is ``q = b c + (b - 1) / 2``,
i.e. the image's top-left corner is at section (0, 0).

Contrast is that of fluorescence: a bright label on a dark background, blurred
by a Gaussian point-spread function and with its own Gaussian noise. The first
marker fills a subset of the cells, the second marks vesicle clusters.
"""
from __future__ import annotations

import math

import cv2
import numpy as np

from ..transforms import Affine2D
from .layout import TAG_CHANNEL, TAG_CHANNEL_NOISE, rng, section_centre, section_shape
from .params import SynthParams

CHANNEL_NAMES = ("ambrin", "stippolin")
CHANNEL_LAYERS = {"ambrin": "fill", "stippolin": "puncta"}
_BACKGROUND, _BRIGHT = 300.0, 3000.0  # 16-bit counts


def channel_shape(params: SynthParams) -> tuple[int, int]:
    """Return ``(height, width)`` of a marker image: it covers the section canvas."""
    h, w = section_shape(params)
    b = params.channel_binning
    return int(math.ceil(h / b)), int(math.ceil(w / b))


def channel_affine(params: SynthParams, section: int, index: int) -> Affine2D:
    """Return the true channel -> section map of marker ``index`` in ``section``."""
    g = rng(params, TAG_CHANNEL, section, index)
    phi = math.radians(g.uniform(-params.channel_rotation, params.channel_rotation))
    shift = g.uniform(-params.channel_shift, params.channel_shift, 2)
    b = float(params.channel_binning)
    nominal = Affine2D(np.array([[b, 0.0, (b - 1) / 2], [0.0, b, (b - 1) / 2]]))
    cx, cy = section_centre(params)
    turn = Affine2D.similarity(1.0, phi, shift[0], shift[1], center=(cx, cy))
    return nominal.then(turn)


def marker_blur(params: SynthParams) -> float:
    """Return the Gaussian sigma (EM pixels) applied before sampling: PSF plus pixel averaging."""
    b = params.channel_binning
    return math.sqrt((b * params.channel_blur) ** 2 + (b * b - 1) / 12.0)


def render_channel(params: SynthParams, section: int, index: int, layer: np.ndarray,
                   px: np.ndarray, py: np.ndarray) -> tuple[np.ndarray, float]:
    """Return the uint16 marker image and its noise sigma.

    Parameters
    ----------
    layer : ndarray
        The marker's true-frame layer in [0, 1] (see :func:`phantom_layers`).
    px, py : ndarray
        True-frame coordinates of every marker pixel (channel -> section -> true).
    """
    soft = cv2.GaussianBlur(layer, (0, 0), marker_blur(params))
    v = cv2.remap(soft, px.astype(np.float32), py.astype(np.float32), cv2.INTER_LINEAR,
                  borderMode=cv2.BORDER_REFLECT)
    signal = _BACKGROUND + _BRIGHT * v
    sigma = float(max(signal.std(), 1.0) / params.channel_snr)
    noisy = signal + sigma * rng(params, TAG_CHANNEL_NOISE, section, index).standard_normal(v.shape)
    return np.clip(np.rint(noisy), 0, 65535).astype(np.uint16), sigma
