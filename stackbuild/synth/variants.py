"""Named synthetic stacks shared by the accuracy tests and benchmarks (alignment, QC).

A variant is a small change to a family's base stack; the same (family,
variant, seed) always gives the same :class:`SynthParams`, so benchmarks of
different stages measure the same data.

========== ==========================================================
variant    what changes
========== ==========================================================
base       12 sections of 3 x 3 tiles of 512 px
dense      cell profiles about 40 px apart (a tangle of thin processes)
small      sections of 2 x 2 tiles
long       36 sections of 2 x 2 tiles
bits12     12-bit values (0..4095) in 16-bit tile files
========== ==========================================================

The realistic family's base distortions follow the alignment issue: rotation
up to 3 degrees, shifts up to 60 px, scale up to 1.5 %, warps up to 6 px.
"""
from __future__ import annotations

import dataclasses

from ..errors import InputError
from .params import CONTENTS, SynthParams

VARIANTS = ("base", "dense", "small", "long", "bits12")

_BASE = dict(sections=12, grid=(3, 3), tile_size=512, channels=0, landmarks=0, compress=False)
_REALISTIC = dict(content="realistic", rotation=3.0, offset=60.0, scale=0.015, warp=6.0)
_CHANGES = {"base": {}, "dense": dict(cell_size=40.0), "small": dict(grid=(2, 2)),
            "long": dict(sections=36, grid=(2, 2)), "bits12": dict(dtype="uint16")}


def variant_params(family: str, variant: str = "base", seed: int = 0, **overrides) -> SynthParams:
    """Return the parameters of a named stack.

    Parameters
    ----------
    family : str
        "standard" or "realistic" (see :attr:`SynthParams.content`).
    variant : str
        One of :data:`VARIANTS`.
    seed : int
        Random seed.
    **overrides
        Any :class:`SynthParams` field, applied last (e.g. ``sections=6``).

    Raises
    ------
    InputError
        For an unknown family, variant or field, or 12-bit tiles when the
        acquisition model cannot write them.
    """
    if family not in CONTENTS:
        raise InputError(f"unknown phantom family {family!r}; expected one of {', '.join(CONTENTS)}")
    if variant not in VARIANTS:
        raise InputError(f"unknown variant {variant!r}; expected one of {', '.join(VARIANTS)}")
    values = {**_BASE, **(_REALISTIC if family == "realistic" else {}), **_CHANGES[variant], "seed": seed}
    names = {f.name for f in dataclasses.fields(SynthParams)}
    if variant == "bits12":
        if "bit_depth" not in names:
            raise InputError("the bits12 variant needs the bit_depth acquisition option, not available yet")
        values["bit_depth"] = 12
    unknown = sorted(set(overrides) - names)
    if unknown:
        raise InputError(f"unknown synth setting(s): {', '.join(unknown)}")
    return SynthParams(**{**values, **overrides})
