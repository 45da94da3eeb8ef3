"""Keypoint tracks in the recording's own pixels.

Reference: OpenCV's INTER_AREA resize by an integer factor averages blocks of source pixels, which
keeps an image's intensity-weighted centroid (the first moment of a box filter is its centre; common
practice, checked here with OpenCV itself). So the centroid of a dot measured in the model frame and
mapped back with :func:`keypoint_pixels` must land on the dot's known source position.
"""

import cv2
import numpy as np
import pytest

from kinecast.config import Config
from kinecast.forecast.cli import latents_csv
from kinecast.forecast.core import keypoint_pixels


@pytest.mark.parametrize("roi", [[], [40, 20, 128, 128]])
def test_model_frame_centroid_maps_back_to_the_source_dot(roi):
    src = np.zeros((200, 240), np.float32)
    dot = (101.0, 77.0)  # x, y in source pixel centres
    yy, xx = np.mgrid[0:200, 0:240]
    src += np.exp(-((xx - dot[0]) ** 2 + (yy - dot[1]) ** 2) / (2 * 3.0 ** 2))
    x0, y0, w, h = roi or [0, 0, 240, 200]
    crop = src[y0:y0 + h, x0:x0 + w]
    dims = (64, 64) if roi else (60, 50)  # 240x200 → 60x50: factor 4 in both directions
    small = cv2.resize(crop, dims, interpolation=cv2.INTER_AREA)
    ny, nx = small.shape
    cy, cx = (np.mgrid[0:ny, 0:nx] * small).reshape(2, -1).sum(1) / small.sum()
    norm = np.array([(2 * cx + 1) / nx - 1, (2 * cy + 1) / ny - 1])
    cfg = Config()
    cfg.solver.time_scale = 3.0
    latents = np.concatenate([norm, [0.1, -0.2]])[None]
    info = {"source_size": [240, 200], "roi": roi}
    out = keypoint_pixels(latents, info, cfg)[0, 0]
    assert out[0] == pytest.approx(dot[0], abs=0.05) and out[1] == pytest.approx(dot[1], abs=0.05)
    # velocity: normalised units per model time unit × (w/2 px per unit) × (3 model units per s)
    assert out[2] == pytest.approx(0.1 * w / 2 * 3.0) and out[3] == pytest.approx(-0.2 * h / 2 * 3.0)


def test_latents_csv_has_keypoint_columns():
    lat = np.zeros((2, 3, 4))
    pix = np.ones((2, 3, 1, 4))
    text = latents_csv(np.arange(3) * 0.1, lat, pix)
    head = text.splitlines()[0].split(",")
    assert head[-4:] == ["kp0_x_px", "kp0_y_px", "kp0_vx_px_s", "kp0_vy_px_s"]
    assert len(text.splitlines()) == 1 + 2 * 3
