"""Pass/fail bars for the report: the ``--fail-on`` expressions.

Syntax
------
One expression names a measure, a comparison and a bar; the build **fails**
when the comparison holds::

    MEASURE OP NUMBER [UNIT]

``MEASURE``  one of the names in :data:`MEASURES` (``align.p95``, ``stitch.rms``, ``flagged`` ...)
``OP``       ``>``, ``>=``, ``<``, ``<=``
``UNIT``     ``px`` or ``nm`` for distances (default ``px``); none, or ``%`` for
             ``rejected.fraction``; counts take no unit.

Spaces are allowed anywhere. Several expressions may be joined with commas
(``"align.p95>2px, flagged>0"``) or the option given several times.
Examples: ``align.p95>2px``, ``stitch.rms > 0.5 px``, ``align.max>=40nm``,
``flagged>0``, ``rejected.fraction>5%``.
"""
from __future__ import annotations

import operator
import re
from dataclasses import dataclass

from ..errors import InputError

#: measure name -> (kind, meaning). kind is "distance", "count" or "fraction".
MEASURES = {
    "stitch.rms": ("distance", "worst section's seam residual RMS"),
    "stitch.p95": ("distance", "worst section's seam residual 95th percentile"),
    "stitch.max": ("distance", "largest seam residual anywhere"),
    "align.rms": ("distance", "RMS over sections of the estimated alignment error"),
    "align.p95": ("distance", "95th percentile over sections of the estimated alignment error"),
    "align.max": ("distance", "largest estimated alignment error of any section"),
    "motion.p95": ("distance", "largest apparent motion (95th percentile) between adjacent planes"),
    "sections.blank": ("count", "sections whose tiles are all blank"),
    "tiles.missing": ("count", "tiles whose files are missing at report time"),
    "sections.unmeasured": ("count", "present sections on which no probe block could be measured"),
    "channels.failed": ("count", "marker images that could not be registered"),
    "elastic.max": ("distance", "largest elastic displacement"),
    "flagged": ("count", "flagged sections plus flagged tiles"),
    "flagged.sections": ("count", "flagged sections"),
    "flagged.tiles": ("count", "flagged tiles"),
    "lost": ("count", "lost sections"),
    "channels.flagged": ("count", "marker channels flagged or not registered"),
    "channels.landmark_rms": ("distance", "RMS landmark residual of the marker registrations"),
    "channels.landmark_max": ("distance", "largest landmark residual of the marker registrations"),
    "rejected": ("count", "rejected tile pairs"),
    "rejected.fraction": ("fraction", "rejected tile pairs over all pairs"),
}
_OPS = {">": operator.gt, ">=": operator.ge, "<": operator.lt, "<=": operator.le}
_PATTERN = re.compile(r"^\s*([a-z][a-z0-9_.]*)\s*(>=|<=|>|<)\s*"
                      r"([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(px|nm|%)?\s*$")
_EXPECTED = ("expected MEASURE OP NUMBER [UNIT], e.g. 'align.p95>2px' or 'flagged>0'; "
             "OP is one of > >= < <=; UNIT is px or nm for distances, % for fractions")


@dataclass(frozen=True)
class Threshold:
    """A failing condition on one measure.

    Attributes
    ----------
    measure : str
        A key of :data:`MEASURES`.
    op : str
        ``">"``, ``">="``, ``"<"`` or ``"<="``.
    value : float
        The bar, in the given unit.
    unit : str
        ``"px"``, ``"nm"``, ``"%"`` or ``""``.
    text : str
        The expression as written.
    """

    measure: str
    op: str
    value: float
    unit: str = ""
    text: str = ""

    def bar(self, pixel_size_nm: float) -> float:
        """Return the bar in the unit of the measure (pixels, counts, or a 0-1 fraction)."""
        if self.unit == "nm":
            return self.value / pixel_size_nm
        if self.unit == "%":
            return self.value / 100.0
        return self.value

    def fails(self, totals: dict, pixel_size_nm: float) -> tuple[bool, float | None]:
        """Return ``(failed, measured)``; a measure that could not be measured does not fail."""
        got = totals.get(self.measure)
        if got is None:
            return False, None
        return bool(_OPS[self.op](float(got), self.bar(pixel_size_nm))), float(got)

    def describe(self) -> str:
        """Return the condition in words, e.g. ``fail if align.p95 > 2 px``."""
        return f"fail if {self.measure} {self.op} {self.value:g}{(' ' + self.unit) if self.unit else ''}"


def parse_fail_on(text: str) -> Threshold:
    """Return the :class:`Threshold` written in ``text``.

    Raises
    ------
    InputError
        When the expression does not follow the syntax of this module, names
        an unknown measure or uses a unit that does not fit the measure.
    """
    if not isinstance(text, str):
        raise InputError(f"--fail-on: {_EXPECTED}; got {text!r}")
    m = _PATTERN.match(text)
    if m is None:
        raise InputError(f"--fail-on {text!r}: {_EXPECTED}")
    name, op, num, unit = m.group(1), m.group(2), float(m.group(3)), m.group(4) or ""
    if name not in MEASURES:
        raise InputError(f"--fail-on {text!r}: unknown measure {name!r}; known: {', '.join(MEASURES)}")
    kind = MEASURES[name][0]
    allowed = {"distance": {"", "px", "nm"}, "count": {""}, "fraction": {"", "%"}}[kind]
    if unit not in allowed:
        shown = ", ".join(sorted(u or "no unit" for u in allowed))
        raise InputError(f"--fail-on {text!r}: {name} is a {kind}; its unit may be {shown}")
    if kind == "distance" and not unit:
        unit = "px"
    return Threshold(name, op, num, unit, text.strip())


def parse_fail_on_list(texts) -> list[Threshold]:
    """Return the thresholds of several expressions, each of which may hold comma-separated ones."""
    if isinstance(texts, str):
        texts = [texts]
    out = []
    for t in texts or []:
        parts = [p for p in t.split(",") if p.strip()]
        if not parts:
            raise InputError(f"--fail-on {t!r}: {_EXPECTED}")
        out.extend(parse_fail_on(p) for p in parts)
    return out


def default_thresholds(settings) -> list[Threshold]:
    """Return the bars set in :class:`~stackbuild.qc.settings.ReportSettings`."""
    # nothing lost or unreadable passes silently: blank sections, missing tiles and failed channels
    # fail the verdict by default
    return [Threshold("stitch.rms", ">", float(settings.stitch_rms), "px", f"stitch.rms>{settings.stitch_rms}px"),
            Threshold("align.p95", ">", float(settings.align_p95), "px", f"align.p95>{settings.align_p95}px"),
            Threshold("align.max", ">", float(settings.align_max), "px", f"align.max>{settings.align_max}px"),
            Threshold("sections.blank", ">", 0.0, "", "sections.blank>0"),
            Threshold("tiles.missing", ">", 0.0, "", "tiles.missing>0"),
            Threshold("sections.unmeasured", ">", 0.0, "", "sections.unmeasured>0"),
            Threshold("channels.failed", ">", 0.0, "", "channels.failed>0")]
