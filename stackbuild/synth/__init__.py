"""Synthetic serial-section EM samples with known ground truth.

``generate(outdir, params)`` renders a 3-D tissue phantom (:mod:`.phantom`),
distorts each section (:mod:`.distort`), images it as overlapping tiles with
vignetting, gain, offset and noise (:mod:`.acquire`) plus low-resolution
marker images (:mod:`.channels`), and writes both manifests and the ground
truth (:mod:`.truth`), which :func:`load_truth` reads back.

The names below are loaded on first use (PEP 562), so that reading
:class:`SynthParams` (as the command line does for every command's help)
does not import the phantom's image-processing stack (about 0.7 s).
"""
from __future__ import annotations

import importlib

_WHERE = {"SynthParams": ".params", "Truth": ".truth", "generate": ".generate", "load_truth": ".truth",
          "phantom_layers": ".phantom", "phantom_section": ".phantom"}

__all__ = sorted(_WHERE)


def __getattr__(name: str):
    if name not in _WHERE:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(_WHERE[name], __name__), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_WHERE))
