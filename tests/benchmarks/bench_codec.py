"""Choose the volume codec by measurement: Blosc compressors, levels and shuffles side by side on EM-like tiles.

Content: tiles of the project's synthetic phantom (``--content realistic`` by
default, the EM-like family: membranes, organelles, shot noise), 8-bit as
acquired and also as a 12-bit detector stores it in 16-bit files (x 16 plus
sub-level noise). Every codec encodes and decodes the same
1024 x 1024 chunks (the render's default chunk) with one Blosc thread, as a
render task does (one task per core). Printed per codec: encode and decode
MB/s of raw pixels, compression ratio, and the encode time relative to the
current default.

Blosc is c-blosc through ``numcodecs``, the library zarr's ``BloscCodec`` calls.

    python tests/benchmarks/bench_codec.py              # 8 chunks per pixel type
    python tests/benchmarks/bench_codec.py --chunks 32
"""
from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import tifffile

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from numcodecs import Blosc, blosc  # noqa: E402

from stackbuild.synth import SynthParams, generate  # noqa: E402

CODECS = [("zstd", 1, Blosc.SHUFFLE), ("zstd", 1, Blosc.BITSHUFFLE), ("zstd", 1, Blosc.NOSHUFFLE),
          ("zstd", 3, Blosc.SHUFFLE), ("zstd", 3, Blosc.BITSHUFFLE), ("zstd", 3, Blosc.NOSHUFFLE),
          ("lz4", 5, Blosc.SHUFFLE), ("lz4", 5, Blosc.BITSHUFFLE), ("lz4hc", 5, Blosc.BITSHUFFLE),
          ("blosclz", 5, Blosc.BITSHUFFLE)]
SHUFFLE_NAMES = {Blosc.SHUFFLE: "shuffle", Blosc.BITSHUFFLE: "bitshuffle", Blosc.NOSHUFFLE: "noshuffle"}
#: The default before this measurement (RenderSettings: zstd, level 3, byte shuffle).
OLD_DEFAULT = ("zstd", 3, Blosc.SHUFFLE)


def em_like_chunks(n: int, content: str, seed: int = 2) -> list[np.ndarray]:
    """Return ``n`` 1024 x 1024 uint8 chunks cut from synthetic phantom tiles."""
    with tempfile.TemporaryDirectory(prefix="bench_codec_") as tmp:
        side = max(1, int(np.ceil(np.sqrt(n))))
        params = SynthParams(seed=seed, sections=1, grid=(side, side), tile_size=1024, channels=0,
                             compress=False, content=content)
        tiles = generate(Path(tmp), params)
        paths = sorted((tiles.parent / "tiles").rglob("*.tif"))
        return [np.ascontiguousarray(tifffile.imread(p)[:1024, :1024]) for p in paths[:n]]


def to16(chunk: np.ndarray, rng) -> np.ndarray:
    """Return an 8-bit chunk as a 12-bit detector in a 16-bit file would give it: x 16 plus sub-level noise."""
    return chunk.astype(np.uint16) * 16 + rng.integers(0, 16, chunk.shape, dtype=np.uint16)


def measure(chunks: list[np.ndarray], codecs, repeat: int) -> dict:
    """Return per codec the encode/decode MB/s (raw pixels) and ratio on ``chunks``.

    The codecs take turns within every repeat (the machine is shared: a slow moment
    then hits all of them alike) and the best time of each is kept.
    """
    raw = sum(c.nbytes for c in chunks)
    enc = {c: [] for c in codecs}
    dec = {c: [] for c in codecs}
    stored = {}
    for _ in range(repeat):
        for c in codecs:
            codec = Blosc(cname=c[0], clevel=c[1], shuffle=c[2], blocksize=0)
            t0 = time.perf_counter()
            encoded = [codec.encode(x) for x in chunks]
            enc[c].append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            for e in encoded:
                codec.decode(e)
            dec[c].append(time.perf_counter() - t0)
            stored[c] = sum(len(e) for e in encoded)
    return {c: {"encode_mb_s": raw / min(enc[c]) / 1e6, "decode_mb_s": raw / min(dec[c]) / 1e6,
                "ratio": raw / stored[c], "encode_s": min(enc[c])} for c in codecs}


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--chunks", type=int, default=8, help="1024^2 chunks per pixel type (default 8)")
    ap.add_argument("--repeat", type=int, default=7, help="timed repeats, best kept")
    ap.add_argument("--content", default="realistic", help="synthetic phantom family (default realistic)")
    args = ap.parse_args(argv)
    blosc.set_nthreads(1)
    base8 = em_like_chunks(args.chunks, args.content)
    rng = np.random.default_rng(0)
    sets = {"uint8": base8, "uint16": [to16(c, rng) for c in base8]}
    print(f"{len(base8)} chunks of 1024 x 1024 from the '{args.content}' phantom; one Blosc thread; "
          f"best of {args.repeat}")
    for dtype, chunks in sets.items():
        rows = measure(chunks, CODECS, args.repeat)
        ref = rows[OLD_DEFAULT]["encode_s"]
        print(f"\n{dtype}: {sum(c.nbytes for c in chunks) / 1e6:.0f} MB raw")
        print(f"{'codec':<26}{'encode MB/s':>12}{'decode MB/s':>12}{'ratio':>8}{'encode time vs old default':>29}")
        for (cname, level, shuffle), r in rows.items():
            name = f"{cname} {level} {SHUFFLE_NAMES[shuffle]}"
            print(f"{name:<26}{r['encode_mb_s']:>12.0f}{r['decode_mb_s']:>12.0f}{r['ratio']:>8.2f}"
                  f"{r['encode_s'] / ref:>29.2f}")


if __name__ == "__main__":
    main()
