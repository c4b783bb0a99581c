"""Synthetic serial-section EM samples with known ground truth.

``generate(outdir, params)`` renders a 3-D tissue phantom (:mod:`.phantom`),
distorts each section (:mod:`.distort`), images it as overlapping tiles with
vignetting, gain, offset and noise (:mod:`.acquire`) plus low-resolution
marker images (:mod:`.channels`), and writes both manifests and the ground
truth (:mod:`.truth`), which :func:`load_truth` reads back.
"""
from .generate import generate
from .params import SynthParams
from .phantom import phantom_layers, phantom_section
from .truth import Truth, load_truth

__all__ = ["SynthParams", "Truth", "generate", "load_truth", "phantom_layers", "phantom_section"]
