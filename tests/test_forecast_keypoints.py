"""Keypoint tracks in the recording's own pixels.

Reference: OpenCV's INTER_AREA resize by an integer factor averages blocks of source pixels, which
keeps an image's intensity-weighted centroid (the first moment of a box filter is its centre; common
practice, checked here with OpenCV itself). A picture that is not square is letterboxed: centred in
the square model frame with its edge pixels repeated (OpenCV copyMakeBorder, BORDER_REPLICATE), which
moves the centroid by the padding. So the centroid of a dot measured in the model frame and mapped
back with :func:`keypoint_pixels` must land on the dot's known source position.
"""

import cv2
import numpy as np
import pytest

from kinecast.config import Config
from kinecast.forecast.cli import latents_csv
from kinecast.forecast.core import keypoint_pixels


@pytest.mark.parametrize("roi", [[], [40, 20, 128, 128]])
def test_model_frame_centroid_maps_back_to_the_source_dot(roi):
    src = np.zeros((200, 256), np.float32)
    dot = (101.0, 77.0)  # x, y in source pixel centres
    yy, xx = np.mgrid[0:200, 0:256]
    src += np.exp(-((xx - dot[0]) ** 2 + (yy - dot[1]) ** 2) / (2 * 3.0 ** 2))
    x0, y0, w, h = roi or [0, 0, 256, 200]
    crop = src[y0:y0 + h, x0:x0 + w]
    factor = 2 if roi else 4  # 128x128 → 64x64; 256x200 → 64x50: the same factor both ways
    small = cv2.resize(crop, (w // factor, h // factor), interpolation=cv2.INTER_AREA)
    pad = (64 - h // factor) // 2  # 64x50 → 7 rows of repeated edge pixels above and below
    small = cv2.copyMakeBorder(small, pad, pad, 0, 0, cv2.BORDER_REPLICATE)
    ny, nx = small.shape
    assert (ny, nx) == (64, 64)
    cy, cx = (np.mgrid[0:ny, 0:nx] * small).reshape(2, -1).sum(1) / small.sum()
    norm = np.array([(2 * cx + 1) / nx - 1, (2 * cy + 1) / ny - 1])
    cfg = Config()
    cfg.solver.time_scale = 3.0
    latents = np.concatenate([norm, [0.1, -0.2]])[None]
    info = {"source_size": [256, 200], "roi": roi}
    out = keypoint_pixels(latents, info, cfg)[0, 0]
    assert out[0] == pytest.approx(dot[0], abs=0.05) and out[1] == pytest.approx(dot[1], abs=0.05)
    # velocity: the time derivative of the position map just checked against the source dot (chain
    # rule, by a finite difference): moving by v·δ model time units, i.e. δ / 3 s, moves the mapped
    # position by (velocity in px/s) · δ / 3 s; the position map is affine, so this is exact.
    delta = 1e-3
    moved = np.concatenate([norm + delta * np.array([0.1, -0.2]), [0.0, 0.0]])[None]
    step = keypoint_pixels(moved, info, cfg)[0, 0, :2] - out[:2]
    np.testing.assert_allclose(out[2:], step / (delta / cfg.solver.time_scale), rtol=1e-6)
    assert abs(out[2]) > 1  # a real velocity in px/s, not a vacuous 0 = 0


def test_latents_csv_has_keypoint_columns():
    lat = np.zeros((2, 3, 4))
    pix = np.ones((2, 3, 1, 4))
    text = latents_csv(np.arange(3) * 0.1, lat, pix)
    head = text.splitlines()[0].split(",")
    assert head[-4:] == ["kp0_x_px", "kp0_y_px", "kp0_vx_px_s", "kp0_vy_px_s"]
    assert len(text.splitlines()) == 1 + 2 * 3
