"""The record of one update: what it will change, written before it changes anything.

Layout::

    DIR/updates/NNNN/plan.json     this record (status, inputs, dirty sections, planes, shards, summary)
    DIR/updates/NNNN/before/       the transform records as they were (hard links: no bytes copied)

``plan.json`` is written atomically at every step, so a killed update leaves a
record that says how far it got; running the same update again (or
``update --resume``) completes exactly that plan, and ``update --rollback``
puts the ``before`` records back.
"""
from __future__ import annotations

import datetime as _dt
import json
import os
import shutil
import signal
from dataclasses import asdict, dataclass, field
from pathlib import Path

from ..errors import InputError
from ..transforms.store import TransformStore, atomic_write_text

PLAN_FORMAT = "stackbuild.update"
PLAN_VERSION = 1
#: Steps of an update, in order; a plan's ``status`` is the last one finished.
STEPS = ("planned", "stitched", "aligned", "registered", "rendered", "done")


@dataclass
class UpdatePlan:
    """One update of a build: inputs, the state before, what is dirty, and how far it got.

    Attributes
    ----------
    number : int
        Update number (folder ``DIR/updates/NNNN``).
    status : str
        The last finished step (see :data:`STEPS`), or ``"rolling_back"`` / ``"rolled_back"``.
    source : dict
        The update's tile manifest: ``path`` and ``sha256``.
    append : bool
        New section numbers were allowed.
    hold_within : float
        Tolerance (section pixels) under which an untouched section keeps its alignment.
    tiles_before, tiles_after : str
        The build's tile manifest before and after (the merged one).
    manifests_before : list of str
        The build's list of earlier merged manifests.
    replaced : dict
        Section (as text) -> tile names replaced or added in an existing section.
    added : list of int
        New sections.
    predicted : dict
        Dirty shards predicted before solving: plane (as text) -> [[i, j], ...] at level 0.
    render : dict or None
        Dirty shards found after solving (same shape), fixed before rendering starts.
    canvas_before : dict or None
        The stored canvas before the update (JSON of :class:`~stackbuild.transforms.records.Canvas`).
    totals_before : dict
        The report's totals before the update (``qc/metrics.json``).
    facts : dict
        What each step found (counts, movements), filled in as the update goes.
    realign_neighbours : bool
        With appended sections: existing sections matched to the new ones take the re-solved
        alignment when it moves them beyond ``hold_within`` (by default every existing section is held).
    """

    number: int
    status: str
    source: dict
    append: bool
    hold_within: float
    tiles_before: str
    tiles_after: str
    manifests_before: list = field(default_factory=list)
    replaced: dict = field(default_factory=dict)
    added: list = field(default_factory=list)
    predicted: dict = field(default_factory=dict)
    render: dict | None = None
    canvas_before: dict | None = None
    totals_before: dict = field(default_factory=dict)
    facts: dict = field(default_factory=dict)
    created: str = ""
    realign_neighbours: bool = False

    @property
    def sections(self) -> list[int]:
        """Sections whose tiles change (replaced or new)."""
        return sorted({int(s) for s in self.replaced} | set(self.added))

    def reached(self, step: str) -> bool:
        """Return True if ``step`` (see :data:`STEPS`) is finished."""
        return self.status in STEPS and STEPS.index(self.status) >= STEPS.index(step)

    def to_json(self) -> dict:
        """Return a JSON-ready dict with the format envelope."""
        return {"format": PLAN_FORMAT, "version": PLAN_VERSION, **asdict(self)}

    @classmethod
    def from_json(cls, doc: dict, path: Path) -> "UpdatePlan":
        """Read a dict written by :meth:`to_json`; raise :class:`InputError` naming ``path`` if it is not one."""
        if not isinstance(doc, dict) or doc.get("format") != PLAN_FORMAT:
            raise InputError(f"not a {PLAN_FORMAT} record", file=path)
        if not isinstance(doc.get("version"), int) or doc["version"] > PLAN_VERSION:
            raise InputError(f"written by a newer stackbuild (version {doc.get('version')})", file=path)
        names = set(cls.__dataclass_fields__)
        try:
            return cls(**{k: v for k, v in doc.items() if k in names})
        except TypeError as exc:
            raise InputError(f"update record is malformed ({exc})", file=path) from None


def pack_shards(shards) -> list[str]:
    """Return shards ``(i, j)`` as sorted ``"i,j"`` strings (compact in the plan)."""
    return [f"{i},{j}" for i, j in sorted(shards)]


def unpack_shards(packed) -> set[tuple[int, int]]:
    """Return the shards ``(i, j)`` of :func:`pack_shards`'s strings."""
    return {tuple(int(v) for v in p.split(",")) for p in packed}


def updates_dir(root: Path) -> Path:
    """Return ``DIR/updates``."""
    return Path(root) / "updates"


def plan_dir(root: Path, number: int) -> Path:
    """Return ``DIR/updates/NNNN``."""
    return updates_dir(root) / f"{number:04d}"


def before_store(root: Path, plan: UpdatePlan) -> TransformStore:
    """Return the transform records as they were before ``plan`` (``DIR/updates/NNNN/before``)."""
    return TransformStore(plan_dir(root, plan.number) / "before")


def save_plan(root: Path, plan: UpdatePlan) -> None:
    """Write ``plan.json`` atomically."""
    atomic_write_text(plan_dir(root, plan.number) / "plan.json", json.dumps(plan.to_json(), indent=1) + "\n")


def load_plans(root: Path) -> list[UpdatePlan]:
    """Return every recorded update of a build, oldest first (folders without a plan are skipped)."""
    base = updates_dir(root)
    if not base.is_dir():
        return []
    out = []
    for d in sorted(p for p in base.iterdir() if p.is_dir() and p.name.isdigit()):
        path = d / "plan.json"
        if not path.exists():
            continue
        try:
            doc = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise InputError(f"update record is unreadable ({exc})", file=path) from None
        out.append(UpdatePlan.from_json(doc, path))
    return out


def unfinished(root: Path) -> UpdatePlan | None:
    """Return the update that was started and not finished (nor rolled back), if any."""
    for plan in reversed(load_plans(root)):
        if plan.status not in ("done", "rolled_back"):
            return plan
    return None


def next_number(root: Path) -> int:
    """Return the number the next update gets."""
    base = updates_dir(root)
    nums = [int(p.name) for p in base.iterdir() if p.name.isdigit()] if base.is_dir() else []
    return 1 + max(nums, default=0)


def _link_tree(src: Path, dst: Path) -> None:
    """Mirror ``src`` into ``dst`` with hard links (copies where links fail), leaving out ``history`` folders.

    Records are only ever replaced by renaming a new file into place, so a linked file keeps
    the old bytes after its record is replaced.
    """
    for dirpath, dirnames, filenames in os.walk(src):
        dirnames[:] = [d for d in dirnames if d != "history"]
        rel = Path(dirpath).relative_to(src)
        (dst / rel).mkdir(parents=True, exist_ok=True)
        for name in filenames:
            a, b = Path(dirpath) / name, dst / rel / name
            try:
                os.link(a, b)
            except OSError:
                shutil.copy2(a, b)


def snapshot_transforms(transforms: Path, dest: Path) -> None:
    """Keep the transform records as they are now in ``dest`` (complete, or not there at all)."""
    tmp = dest.with_name(dest.name + ".partial")
    shutil.rmtree(tmp, ignore_errors=True)
    if transforms.exists():
        _link_tree(transforms, tmp)
    else:
        tmp.mkdir(parents=True)
    os.replace(tmp, dest)


def now() -> str:
    """Return the current UTC time, ISO 8601 to the second."""
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


#: Test hook: ``STACKBUILD_UPDATE_KILL=align|channels|render`` kills the update's process group
#: part-way through that step (after some of its results are written, before it is recorded),
#: as a ``kill -9`` would; the fault tests use it to stop at a known place.
KILL_ENV = "STACKBUILD_UPDATE_KILL"


def killed_here(step: str) -> None:
    """Kill this process group if :data:`KILL_ENV` names ``step`` (test hook)."""
    if os.environ.get(KILL_ENV) == step:
        os.killpg(os.getpgid(0), signal.SIGKILL)
