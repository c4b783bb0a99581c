"""The ground truth of a synthetic sample: how to read it back and ask it questions.

Layout of ``OUTDIR/truth/``
---------------------------
``truth.json`` (UTF-8, keys sorted), with

* ``format`` = ``"stackbuild-synth-truth"``, ``version`` = 1;
* ``params``: every :class:`SynthParams` field (tuples as lists);
* ``pixel_size``, ``section_thickness`` (nm); ``true_shape``, ``section_shape``,
  ``tile_shape`` as ``[height, width]``; ``vignetting`` (corner darkening);
  ``intensity_scale`` (1 for uint8 tiles, 256 for uint16, 16 for 12-bit values in uint16:
  stored grey = scale x model grey);
* ``slant``: the slant field (plane waves minus affine part, ``z_ref``, ``drift``;
  see :func:`stackbuild.synth.phantom.slant_model`);
* ``lost_sections``; ``defects`` = ``{"blank_tiles": [[section, tile], ...],
  "lost_sections": [...], "damaged_sections": {section: fold}, "repetitive_pair":
  {"section", "tiles", "box", "period"} or null}``; a fold is a band
  ``|(q - point) . normal| < half_width`` in section pixels;
* ``sections``: ``{section: {...}}`` for every section present, with
  ``affine`` (2x3, section -> true, acting on ``(x, y, 1)``), ``field``
  (``{"file": "fields/<section>.npy", "origin": [x, y], "spacing": px}``; the
  ``.npy`` holds float32 ``(ny, nx, 2)`` node displacements ``(dx, dy)``),
  ``noise_std`` (tile noise sigma, 8-bit grey levels), ``tiles`` (``tile ->
  {"x", "y"`` true position of pixel (0, 0) in section pixels, ``"stage_x",
  "stage_y"`` as written to ``tiles.csv``, ``"gain", "offset", "blank"}``) and
  ``channels`` (``name -> {"path", "pixel_size", "affine"`` (2x3, channel pixel
  -> section pixel), ``"noise_std"}``).

Section ``k`` maps to the true frame as ``p = A_k q + w_k(q)``; a tile pixel
``(i, j)`` is the section point ``(i, j) + (x, y)``. Undistorted sections are not
stored: :meth:`Truth.undistorted` re-renders them from the deterministic phantom.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..transforms import Affine2D, DisplacementField
from .acquire import fold_mask, vignetting_profile
from .distort import section_to_true, true_to_section
from .params import SynthParams
from .phantom import phantom_layers, phantom_section, slant_at

FORMAT = "stackbuild-synth-truth"
VERSION = 1


def write_truth(outdir: Path, record: dict, fields: dict[int, DisplacementField]) -> Path:
    """Write ``truth/truth.json`` and the field arrays; return the JSON path."""
    folder = Path(outdir) / "truth"
    (folder / "fields").mkdir(parents=True, exist_ok=True)
    for section, field in fields.items():
        with open(folder / "fields" / f"{section}.npy", "wb") as fh:
            np.save(fh, field.vectors, allow_pickle=False)
    path = folder / "truth.json"
    path.write_text(json.dumps({"format": FORMAT, "version": VERSION, **record}, sort_keys=True, indent=1) + "\n",
                    encoding="utf-8")
    return path


class Truth:
    """The ground truth of one generated sample (see the module docstring for the stored form)."""

    def __init__(self, record: dict, folder: Path):
        self.record = record
        self.folder = folder
        self.params = SynthParams.from_json(record["params"])
        self.pixel_size = float(record["pixel_size"])
        self.section_thickness = float(record["section_thickness"])
        self.true_shape = tuple(record["true_shape"])
        self.section_shape = tuple(record["section_shape"])
        self.tile_shape = tuple(record["tile_shape"])
        self.lost_sections = list(record["lost_sections"])
        self.defects = record["defects"]
        self.sections = sorted(int(s) for s in record["sections"])
        self._fields: dict[int, DisplacementField] = {}

    def _sec(self, section: int) -> dict:
        try:
            return self.record["sections"][str(int(section))]
        except KeyError:
            raise InputError(f"no ground truth for section {section} (present: {self.sections})",
                             file=self.folder / "truth.json", section=section) from None

    def tile_positions(self, section: int) -> dict[str, tuple[float, float]]:
        """Return ``tile -> (x, y)``: true section-pixel position of each tile's pixel (0, 0) centre."""
        return {t: (r["x"], r["y"]) for t, r in self._sec(section)["tiles"].items()}

    def stage_positions(self, section: int) -> dict[str, tuple[float, float]]:
        """Return ``tile -> (x, y)`` as reported in the tile manifest."""
        return {t: (r["stage_x"], r["stage_y"]) for t, r in self._sec(section)["tiles"].items()}

    def tile_gain_offset(self, section: int) -> dict[str, tuple[float, float]]:
        """Return ``tile -> (gain, offset)``; recorded = gain * vignette * content + offset (8-bit scale)."""
        return {t: (r["gain"], r["offset"]) for t, r in self._sec(section)["tiles"].items()}

    def noise_std(self, section: int) -> float:
        """Return the tile noise sigma of a section, 8-bit grey levels."""
        return float(self._sec(section)["noise_std"])

    def vignette(self) -> np.ndarray:
        """Return the shared tile falloff (float32, tile shape)."""
        return vignetting_profile(self.tile_shape, self.record["vignetting"])

    def section_affine(self, section: int) -> Affine2D:
        """Return ``A_k`` (section -> true)."""
        return Affine2D(np.asarray(self._sec(section)["affine"]))

    def section_field(self, section: int) -> DisplacementField:
        """Return the elastic warp ``w_k`` (section frame, pixels)."""
        if section not in self._fields:
            rec = self._sec(section)["field"]
            vectors = np.load(self.folder / rec["file"], allow_pickle=False)
            self._fields[section] = DisplacementField(vectors, tuple(rec["origin"]), rec["spacing"])
        return self._fields[section]

    def section_to_true(self, section: int, points_xy) -> np.ndarray:
        """Return true-frame ``(x, y)`` of ``(N, 2)`` section-pixel points."""
        return section_to_true(self.section_affine(section), self.section_field(section), points_xy)

    def true_to_section(self, section: int, points_xy) -> np.ndarray:
        """Return section-pixel ``(x, y)`` of ``(N, 2)`` true-frame points (fixed-point inverse)."""
        return true_to_section(self.section_affine(section), self.section_field(section), points_xy)

    def undistorted(self, section: int) -> np.ndarray:
        """Return the undistorted section in the true frame (float32, 8-bit grey scale)."""
        self._sec(section)
        return phantom_section(self.params, section)

    def markers(self, section: int) -> dict[str, np.ndarray]:
        """Return the true-frame marker layers ``"fill"`` and ``"puncta"`` in [0, 1]."""
        layers = phantom_layers(self.params, section, markers=True)
        return {k: v for k, v in layers.items() if k != "em"}

    def slant(self, points_xy) -> np.ndarray:
        """Return the true drift of structures per section (slant + drift) at true-frame points."""
        rec = self.record["slant"]
        return slant_at(rec, points_xy) + np.asarray(rec["drift"])

    def channels(self, section: int) -> list[str]:
        """Return the marker channels imaged for a section."""
        return sorted(self._sec(section)["channels"])

    def channel_affine(self, section: int, channel: str) -> Affine2D:
        """Return the true channel-pixel -> section-pixel map."""
        chans = self._sec(section)["channels"]
        if channel not in chans:
            raise InputError(f"no channel {channel!r} in section {section}", section=section)
        return Affine2D(np.asarray(chans[channel]["affine"]))

    def channel_to_section(self, section: int, channel: str, points_xy) -> np.ndarray:
        """Return section-pixel ``(x, y)`` of ``(N, 2)`` channel-pixel points."""
        return self.channel_affine(section, channel).apply(np.asarray(points_xy, np.float64).reshape(-1, 2))

    def damage_mask(self, section: int) -> np.ndarray | None:
        """Return the fold mask on the section canvas (float32, 1 = fold), or None if undamaged."""
        fold = self.defects["damaged_sections"].get(str(section))
        if fold is None:
            return None
        h, w = self.section_shape
        return fold_mask(fold, np.arange(w, dtype=np.float64), np.arange(h, dtype=np.float64))


def load_truth(outdir) -> Truth:
    """Return the ground truth written by :func:`stackbuild.synth.generate` into ``outdir``.

    Raises
    ------
    InputError
        If ``outdir/truth/truth.json`` is missing or not a truth record of a known version.
    """
    path = Path(outdir) / "truth" / "truth.json"
    if not path.is_file():
        raise InputError("ground truth not found", file=path)
    try:
        rec = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"not a valid JSON file ({exc})", file=path) from None
    if rec.get("format") != FORMAT or rec.get("version") != VERSION:
        raise InputError(f"not a {FORMAT} version {VERSION} record", file=path)
    return Truth(rec, path.parent)
