"""Scale-bar lengths and the stack strip's plane thumbnails: small PNGs encoded by OpenCV."""
from __future__ import annotations

import numpy as np

from .colours import NO_DATA_RGB


def nice_length(span_nm: float) -> float:
    """Return a round length (1, 2 or 5 times a power of ten, nm) of about a fifth of ``span_nm``."""
    target = max(span_nm / 5.0, 1e-9)
    base = 10 ** np.floor(np.log10(target))
    return float(max((m * base for m in (1, 2, 5) if m * base <= target), default=base))


def scale_text(nm: float) -> str:
    """Return ``nm`` as text in nm or um."""
    return f"{nm / 1000:g} \u00b5m" if nm >= 1000 else f"{nm:g} nm"


def thumbnail_png(plane: np.ndarray, nm_per_px: float, bar_nm: float, height: int = 56) -> bytes:
    """Return a small grey PNG of a plane with a white scale bar of ``bar_nm`` burned in (no-data pixels pink)."""
    import cv2

    img = np.asarray(plane, np.float32)
    if img.size == 0:
        img = np.zeros((height, height), np.float32)
    scale = height / img.shape[0]
    w = max(8, int(round(img.shape[1] * scale)))
    small = cv2.resize(img, (w, height), interpolation=cv2.INTER_AREA)
    empty = cv2.resize((img == 0).astype(np.float32), (w, height), interpolation=cv2.INTER_AREA) > 0.5
    data = small[~empty]
    lo, hi = (np.percentile(data, [1, 99]) if data.size else (0.0, 1.0))
    g = np.clip((small - lo) / max(hi - lo, 1e-6) * 255, 0, 255).astype(np.uint8)
    rgb = np.dstack([g, g, g])
    rgb[empty] = NO_DATA_RGB
    px = bar_nm / (nm_per_px / scale)
    x0, y0 = 3, height - 6
    x1 = int(min(w - 2, x0 + max(2, round(px))))
    rgb[y0 - 1:y0 + 3, x0 - 1:x1 + 1] = (34, 49, 63)
    rgb[y0:y0 + 2, x0:x1] = (255, 255, 255)
    return png_bytes(rgb)


def png_bytes(rgb: np.ndarray) -> bytes:
    """Return an RGB (or grey) uint8 image as PNG bytes (OpenCV, zlib level 1)."""
    import cv2

    img = np.ascontiguousarray(rgb[..., ::-1] if rgb.ndim == 3 else rgb)
    ok, buf = cv2.imencode(".png", img, [cv2.IMWRITE_PNG_COMPRESSION, 1])
    if not ok:
        raise ValueError(f"cannot encode an image of shape {rgb.shape} as PNG")
    return buf.tobytes()
