"""The import order of /work/shared/STYLE.md's layers, every import included (function-level ones too).

Rule of the project (see DEVELOPERS.md, "Layout = data flow"), no outside source: a module may import
only from its own layer or the ones before it; within layer 4 the stages keep the data-flow order.
"""
import ast
import graphlib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1] / "stackbuild"
STAGES = ("stitch", "align", "channels", "render", "qc")
LAYERS = {"errors": 1, "transforms": 1, "_version": 1, "tiffhead": 1, "config": 2, "manifest": 2, "tiles": 2, "sampler": 2,
          "synth": 2, "folder": 3, **{s: 4 + i / 10 for i, s in enumerate(STAGES)}, "run": 5, "cli": 6, "": 6}


def layer(mod: str) -> float:
    parts = mod.split(".")[1:]  # without "stackbuild"
    if len(parts) == 2 and parts[0] in STAGES and parts[1] == "settings":
        return 1  # each stage's settings (and their check) sit with the pure code
    return LAYERS[parts[0] if parts else ""]


def imports() -> dict[str, set[str]]:
    """Return ``{module: {stackbuild modules it imports}}``, relative imports resolved."""
    out = {}
    for p in ROOT.rglob("*.py"):
        parts = ("stackbuild", *p.relative_to(ROOT).with_suffix("").parts)
        mod = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        pkg = parts[:-1]
        found = out.setdefault(mod, set())
        for node in ast.walk(ast.parse(p.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                found |= {a.name for a in node.names if a.name.split(".")[0] == "stackbuild"}
            elif isinstance(node, ast.ImportFrom):
                base = ".".join(pkg[:len(pkg) - node.level + 1] if node.level else ())
                target = ".".join(x for x in (base, node.module or "") if x)
                if target.split(".")[0] == "stackbuild":
                    for a in node.names:  # ``from pkg import module`` imports the module
                        sub = f"{target}.{a.name}"
                        is_mod = (ROOT.parent / sub.replace(".", "/")).with_suffix(".py").exists() \
                            or (ROOT.parent / sub.replace(".", "/") / "__init__.py").exists()
                        found.add(sub if is_mod else target)
    return out


def test_no_import_runs_against_the_layers():
    bad = [f"{m} (layer {layer(m)}) imports {t} (layer {layer(t)})"
           for m, targets in imports().items() for t in targets
           if layer(t) > layer(m) and not t.startswith(m + ".")]  # a package may name its own modules
    assert not bad, "\n".join(sorted(bad))


def test_package_inits_import_nothing_above_their_lowest_module():
    # Importing stackbuild.stitch.settings runs stackbuild/stitch/__init__.py first.
    graph = imports()
    for pkg in {m.rsplit(".", 1)[0] for m in graph if m.count(".") >= 2}:
        low = min(layer(m) for m in graph if m.startswith(pkg + "."))
        assert all(layer(t) <= low for t in graph.get(pkg, ())), f"{pkg}/__init__.py imports {graph[pkg]}"


def test_no_import_cycle():
    graphlib.TopologicalSorter(imports()).prepare()  # raises CycleError naming the cycle
