"""Pipeline TOML -> typed, validated settings.

A pipeline file has one table per stage (``[volume]``, ``[stitch]``,
``[align]``, ``[channels]``, ``[render]``, ``[report]``); every key is optional and defaults
to the value documented on the stage's settings class. Unknown tables or
keys, and values of the wrong type, are errors naming the file and key.
"""
from __future__ import annotations

import dataclasses
import textwrap
import tomllib
import typing
from dataclasses import dataclass, field
from pathlib import Path

from .align.settings import AlignSettings
from .align.settings import check_settings as check_align
from .channels.settings import ChannelSettings
from .channels.settings import check_settings as check_channels
from .errors import InputError
from .qc.settings import ReportSettings
from .qc.settings import check_settings as check_report
from .render.settings import RenderSettings
from .render.settings import check_settings as check_render
from .stitch.settings import StitchSettings
from .stitch.settings import check_settings as check_stitch


@dataclass
class VolumeSettings:
    """Physical scale of the volume (TOML table ``[volume]``).

    Attributes
    ----------
    pixel_size : float
        Nanometres per full-resolution pixel in x and y.
    section_thickness : float
        Nanometres between consecutive sections (z step).
    """

    pixel_size: float = 4.0
    section_thickness: float = 40.0


@dataclass
class PipelineConfig:
    """All settings of one build."""

    volume: VolumeSettings = field(default_factory=VolumeSettings)
    stitch: StitchSettings = field(default_factory=StitchSettings)
    align: AlignSettings = field(default_factory=AlignSettings)
    channels: ChannelSettings = field(default_factory=ChannelSettings)
    render: RenderSettings = field(default_factory=RenderSettings)
    report: ReportSettings = field(default_factory=ReportSettings)

    def to_json(self) -> dict:
        """Return all settings as a plain dict (for the build record)."""
        return dataclasses.asdict(self)

    @classmethod
    def from_json(cls, rec: dict, source: str = "build.json") -> "PipelineConfig":
        """Rebuild settings from :meth:`to_json` output."""
        return _from_tables(rec, source)


def _coerce(value, kind, where: str, source: str):
    origin = typing.get_origin(kind)
    if kind is bool:
        if isinstance(value, bool):
            return value
    elif kind is int:
        if isinstance(value, int) and not isinstance(value, bool):
            return value
    elif kind is float:
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            return float(value)
    elif kind is str:
        if isinstance(value, str):
            return value
    elif origin is tuple:
        args = typing.get_args(kind)
        if isinstance(value, (list, tuple)) and len(value) == len(args):
            return tuple(_coerce(v, a, where, source) for v, a in zip(value, args))
    name = getattr(kind, "__name__", str(kind))
    raise InputError(f"{where} must be {name}, got {value!r}", file=source)


def _fill(cls, table: dict, name: str, source: str):
    if not isinstance(table, dict):
        raise InputError(f"[{name}] must be a table", file=source)
    hints = typing.get_type_hints(cls)
    known = {f.name for f in dataclasses.fields(cls)}
    unknown = sorted(set(table) - known)
    if unknown:
        raise InputError(f"unknown key(s) in [{name}]: {', '.join(unknown)}; known: {', '.join(sorted(known))}",
                         file=source)
    return cls(**{k: _coerce(v, hints[k], f"[{name}] {k}", source) for k, v in table.items()})


def _from_tables(tables: dict, source: str) -> PipelineConfig:
    hints = typing.get_type_hints(PipelineConfig)
    unknown = sorted(set(tables) - set(hints))
    if unknown:
        raise InputError(f"unknown table(s) {', '.join(unknown)}; known: {', '.join(hints)}", file=source)
    return PipelineConfig(**{k: _fill(hints[k], v, k, source) for k, v in tables.items()})


def load_config(path: str | Path | None = None) -> PipelineConfig:
    """Return the settings of a pipeline TOML file (defaults when ``path`` is None).

    Raises
    ------
    InputError
        If the file is missing, is not valid TOML, or has unknown keys, wrong
        types or values out of range (see :func:`check_config`).
    """
    if path is None:
        return PipelineConfig()
    path = Path(path)
    try:
        tables = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError("pipeline file not found", file=path) from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"not valid TOML ({exc})", file=path) from None
    cfg = _from_tables(tables, str(path))
    check_config(cfg, str(path))
    return cfg


#: ``(table, key, test, wanted)`` of the ``[volume]`` table (the stages check their own tables).
_RANGES = (
    ("volume", "pixel_size", lambda v: v > 0, "> 0"),
    ("volume", "section_thickness", lambda v: v > 0, "> 0"),
)


def check_config(cfg: PipelineConfig, source: str) -> None:
    """Raise :class:`InputError` naming ``source`` and the key of the first value that cannot work.

    Runs every stage's own settings check (each in its ``settings.py``) up front, so a bad
    value is refused before the build folder is made, not when its stage starts hours later.
    """
    for table, key, ok, wanted in _RANGES:
        value = getattr(getattr(cfg, table), key)
        if not ok(value):
            raise InputError(f"[{table}] {key} must be {wanted}, got {value!r}", file=source)
    for check, settings in ((check_stitch, cfg.stitch), (check_align, cfg.align),
                            (check_channels, cfg.channels), (check_render, cfg.render),
                            (check_report, cfg.report)):
        try:
            check(settings)
        except InputError as exc:
            raise InputError(exc.reason, file=source) from None


def attribute_docs(cls) -> dict[str, str]:
    """Return ``{field: description}`` from a numpy-style ``Attributes`` docstring section."""
    out, current, inside = {}, None, False
    for line in (cls.__doc__ or "").splitlines():
        text = line.strip()
        if text == "Attributes":
            inside = True
            continue
        if not inside or not text or set(text) == {"-"}:
            continue
        indent = len(line) - len(line.lstrip())
        if " : " in text and indent <= 4:
            current = text.split(" : ")[0].strip()
            out[current] = ""
        elif current:
            out[current] = f"{out[current]} {text}".strip()
    return out


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, (tuple, list)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    return repr(value)


def default_toml() -> str:
    """Return a pipeline file listing every setting with its default and its one-line description."""
    lines = ["# stackbuild pipeline settings: every key, with its default value.",
             "# Pass with: stackbuild build TILES_CSV --out DIR --config PIPELINE.toml",
             "# Units: pixels are full-resolution (level 0) pixels unless a key says otherwise.",
             "# Made by stackbuild.config.default_toml(); the tests keep it equal to the code."]
    defaults = PipelineConfig()
    for table in dataclasses.fields(PipelineConfig):
        settings = getattr(defaults, table.name)
        docs = attribute_docs(type(settings))
        lines += ["", f"[{table.name}]"]
        for f in dataclasses.fields(settings):
            note = docs.get(f.name, "").replace("``", "")
            lines += ["# " + part for part in textwrap.wrap(note, 86)]
            lines.append(f"{f.name} = {_toml_value(getattr(settings, f.name))}")
    return "\n".join(lines) + "\n"
