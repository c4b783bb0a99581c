"""``tiles.csv`` and ``pairs.csv`` written from per-section parts, so a re-report writes again only what changed.

Each measured section's rows (``DIR/qc/measured/sections/<section>.json``, see
:mod:`stackbuild.qc.sections`) are kept a second time as CSV text, one part per section and
table (``DIR/qc/measured/parts/<table>-<section>.json``: the columns, the rows as CSV, and the
SHA-256 of the section file they were made from). A table is the header and the parts one
after the other; a part is made again only when its section file changed, so after an update
that measured one section again the table costs one section's rows, not the stack's.

The result is byte for byte what :func:`stackbuild.qc.metrics._write_csv` writes from the same
rows (columns in first-seen order): when every section with rows has the same columns, that
order is each section's own. When they differ (a section with extra columns), the caller's
whole-table writer is used instead.
"""
from __future__ import annotations

import csv
import hashlib
import io
import json
from pathlib import Path
from typing import Callable, TextIO

from ..folder import BuildFolder
from ..transforms.store import replace_atomically
from .reuse import stored_measurement, write_measurement
from .sections import section_file


def _part(build, section: int, table: str, flat: Callable[[dict], dict]) -> tuple[list[str], str]:
    """Return the columns and the CSV rows (no header) of one section's ``table`` rows, kept or made now."""
    try:
        data = section_file(build, section).read_bytes()
    except OSError:
        return [], ""
    made_from = hashlib.sha256(data).hexdigest()
    path = BuildFolder(build).measurement_path("parts", f"{table}-{int(section):05d}")
    kept = stored_measurement(path)
    if kept is not None and kept.get("made_from") == made_from:
        return kept["columns"], kept["text"]
    rows = [flat(r) for r in (json.loads(data).get(table) or [])]
    columns = list(dict.fromkeys(k for r in rows for k in r))
    buf = io.StringIO(newline="")
    csv.DictWriter(buf, fieldnames=columns).writerows(rows)
    text = buf.getvalue()
    write_measurement(path, {"made_from": made_from, "columns": columns, "text": text})
    return columns, text


def write_table(build, sections: list[int], table: str, path: Path, flat: Callable[[dict], dict],
                whole: Callable[[], Path]) -> Path:
    """Write ``table`` (``"tiles"`` or ``"pairs"``) of ``sections`` to ``path`` from the sections' parts.

    ``flat`` flattens one row into columns; ``whole()`` writes the table from all rows instead,
    and is called when the sections' columns differ or no section has rows.
    """
    def write(fh: TextIO) -> bool:
        columns = None
        for s in sections:
            cols, text = _part(build, s, table, flat)
            if not text:
                continue
            if columns is None:
                columns = cols
                csv.writer(fh).writerow(columns)
            elif cols != columns:
                return False
            fh.write(text)
        return columns is not None

    # a reader never sees half a table; one lost to a power cut is written again by the next report
    return path if replace_atomically(path, write, durable=False, newline="") else whole()
