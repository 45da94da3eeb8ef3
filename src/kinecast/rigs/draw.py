"""Anti-aliased drawing of simple shapes so that sub-pixel motion shows in the frames.

Each shape is a signed distance field evaluated on a supersampled grid inside the shape's bounding
box; coverage ``clip(0.5 - distance, 0, 1)`` (distance in supersampled pixels) is alpha-blended over
the canvas, and :meth:`Canvas.image` averages each ``SUPERSAMPLE × SUPERSAMPLE`` block (an exact
area average). Coordinates are in output pixels with the centre of the top-left pixel at (0, 0),
x to the right and y down.
"""

from __future__ import annotations

import cv2
import numpy as np

# Supersampling factor per axis. With the one-sub-pixel coverage ramp this puts the edge of a shape
# within about 1/16 of an output pixel of its exact area coverage.
SUPERSAMPLE = 4


class Canvas:
    """A supersampled RGB float canvas over a fixed background.

    Parameters
    ----------
    background : ndarray, float32, shape (H, W, 3)
        The static background at output resolution, intensities in [0, 1].

    Examples
    --------
    >>> import numpy as np
    >>> c = Canvas(np.zeros((8, 8, 3), np.float32))
    >>> c.disc(3.5, 3.5, 2.0, (1.0, 1.0, 1.0))
    >>> round(float(c.image()[..., 0].sum()), 1)  # area of a disc of radius 2 = 4 pi
    12.6
    """

    def __init__(self, background: np.ndarray):
        self.height, self.width = background.shape[:2]
        self._base = np.repeat(np.repeat(background.astype(np.float32), SUPERSAMPLE, 0), SUPERSAMPLE, 1)
        self.px = self._base.copy()

    def clear(self) -> None:
        """Back to the bare background."""
        np.copyto(self.px, self._base)

    def keep(self) -> None:
        """Make everything drawn so far part of the background (static scenery)."""
        np.copyto(self._base, self.px)

    def image(self) -> np.ndarray:
        """The canvas at output resolution, float32 (H, W, 3).

        OpenCV's INTER_AREA at an integer factor is the exact block mean (OpenCV documentation;
        it equals ``reshape(H, s, W, s, 3).mean((1, 3))`` to float32 rounding) and is far faster.
        """
        return cv2.resize(self.px, (self.width, self.height), interpolation=cv2.INTER_AREA)

    # -- geometry helpers ---------------------------------------------------------------------------
    @staticmethod
    def _ss(v) -> np.ndarray:
        """Output-pixel coordinates to supersampled-pixel coordinates (pixel centres align)."""
        return np.asarray(v, dtype=np.float64) * SUPERSAMPLE + (SUPERSAMPLE - 1) / 2

    def _grid(self, x0: float, y0: float, x1: float, y1: float):
        """Supersampled pixel grid covering the box (output pixels), clipped to the canvas."""
        s = SUPERSAMPLE
        c0 = max(0, int(np.floor(self._ss(x0))) - s)
        r0 = max(0, int(np.floor(self._ss(y0))) - s)
        c1 = min(self.px.shape[1], int(np.ceil(self._ss(x1))) + s + 1)
        r1 = min(self.px.shape[0], int(np.ceil(self._ss(y1))) + s + 1)
        if c1 <= c0 or r1 <= r0:
            return None
        yy, xx = np.mgrid[r0:r1, c0:c1].astype(np.float64)
        return (slice(r0, r1), slice(c0, c1)), xx, yy

    def _blend(self, where, distance: np.ndarray, colour, opacity: float = 1.0) -> None:
        alpha = np.clip(0.5 - distance, 0.0, 1.0).astype(np.float32)[..., None]
        if opacity != 1.0:
            alpha *= np.float32(opacity)
        region = self.px[where]
        region += alpha * (np.asarray(colour, dtype=np.float32) - region)

    # -- shapes -------------------------------------------------------------------------------------
    def disc(self, x: float, y: float, r: float, colour) -> None:
        """A filled disc of radius ``r`` centred at (x, y)."""
        g = self._grid(x - r, y - r, x + r, y + r)
        if g is None:
            return
        where, xx, yy = g
        d = np.hypot(xx - self._ss(x), yy - self._ss(y)) - r * SUPERSAMPLE
        self._blend(where, d, colour)

    def polyline(self, xs, ys, width: float, colour, opacity: float = 1.0) -> None:
        """A stroke of the given width through the points (round joins and caps); ``opacity`` < 1
        lets the background show through."""
        xs, ys = np.asarray(xs, dtype=np.float64), np.asarray(ys, dtype=np.float64)
        half = width / 2
        g = self._grid(xs.min() - half, ys.min() - half, xs.max() + half, ys.max() + half)
        if g is None:
            return
        where, xx, yy = g
        ax, ay = self._ss(xs[:-1]), self._ss(ys[:-1])
        bx, by = self._ss(xs[1:]), self._ss(ys[1:])
        d = np.full(xx.shape, np.inf)
        for i in range(len(ax)):
            ex, ey = bx[i] - ax[i], by[i] - ay[i]
            px, py = xx - ax[i], yy - ay[i]
            t = np.clip((px * ex + py * ey) / max(ex * ex + ey * ey, 1e-12), 0.0, 1.0)
            np.minimum(d, np.hypot(px - t * ex, py - t * ey), out=d)
        self._blend(where, d - half * SUPERSAMPLE, colour, opacity)

    def segment(self, x0: float, y0: float, x1: float, y1: float, width: float, colour,
                opacity: float = 1.0) -> None:
        """A straight stroke from (x0, y0) to (x1, y1)."""
        self.polyline([x0, x1], [y0, y1], width, colour, opacity)

    def box(self, x0: float, y0: float, x1: float, y1: float, colour, corner: float = 0.0,
            opacity: float = 1.0) -> None:
        """A filled axis-aligned rectangle between its edges (x0, y0) and (x1, y1), with rounded
        corners of radius ``corner``."""
        g = self._grid(x0, y0, x1, y1)
        if g is None:
            return
        where, xx, yy = g
        s = SUPERSAMPLE
        cx, cy = self._ss((x0 + x1) / 2), self._ss((y0 + y1) / 2)
        hx, hy = (x1 - x0) / 2 * s - corner * s, (y1 - y0) / 2 * s - corner * s
        qx, qy = np.abs(xx - cx) - hx, np.abs(yy - cy) - hy
        outside = np.hypot(np.maximum(qx, 0), np.maximum(qy, 0))
        inside = np.minimum(np.maximum(qx, qy), 0)
        self._blend(where, outside + inside - corner * s, colour, opacity)
