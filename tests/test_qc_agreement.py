"""The estimated alignment error agrees with the truth on small synthetic stacks.

Ground truth: stackbuild.synth (invented phantoms) and the identifiable residual of the
alignment issue (stackbuild.synth.residual), which removes what no aligner can know. The bar
is issue 14's: per section within 30 % or 0.3 px, whichever is larger, for >= 90 % of
sections. The benchmark (tests/benchmarks/bench_qc.py --agreement) runs 3 seeds of both
families on larger stacks; these are the fast versions.
"""
from __future__ import annotations

import pytest

from stackbuild.cli import main
from stackbuild.qc.metrics import collect
from stackbuild.qc.settings import ReportSettings
from stackbuild.synth import generate
from stackbuild.synth.residual import identifiable_residual
from stackbuild.synth.variants import variant_params


def _built(root, family: str, seed: int):
    data = root / "data"
    generate(data, variant_params(family, "small", seed, sections=6, tile_size=384))
    out = root / "build"
    assert main(["build", str(data / "tiles.csv"), "--out", str(out), "--workers", "1", "--quiet"]) in (0, 3)
    return data, out


@pytest.mark.parametrize("family", ["standard"])
def test_estimate_agrees_with_the_identifiable_residual(tmp_path, family):
    data, out = _built(tmp_path, family, 3)
    truth = identifiable_residual(out, data)
    doc, _ = collect(out, ReportSettings())
    est = {r["section"]: r["align_error_px"] for r in doc["sections"]}
    rows = [(s, v["rms"], est.get(s)) for s, v in truth.per_section.items()]
    ok = [e is not None and abs(e - t) <= max(0.3 * t, 0.3) for _, t, e in rows]
    assert sum(ok) >= 0.9 * len(ok), rows
