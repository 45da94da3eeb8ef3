"""Recordings that kinecast's own rigs did not make: ``python bench/foreign.py OUT [--trials N] [--video S]``.

kinecast is used on recordings made by other software, with other objects, backgrounds, lighting,
frame sizes and file formats. Tuning the recipe on the rigs that kinecast renders itself could hide
a failure there, so this script draws test scenes with code that shares nothing with
``kinecast.rigs``: the physics is integrated by :func:`scipy.integrate.solve_ivp` or written in
closed form, and the frames are drawn with OpenCV primitives, at a non-square size, with camera
noise and lossy compression, and written as the files another program would write (JPEG or PNG,
plus a ``timestamps.csv`` at 30 frames per second).

Scenes (each a folder of trial folders, like a rig scene, so ``bench/recipe.py --rigs foreign
--looks NAME`` trains and scores them):

``rod_pendulum``
    A dark rod with a heavier end swinging from a bracket on a light, unevenly lit wall; damped
    simple pendulum θ'' = −(g/L) sin θ − c θ' (handbook small-angle period 2π√(L/g) ≈ 1.6 s).
    JPEG frames, 320 × 240, RGB.
``ball_floor``
    A striped ball bouncing on a checkered floor seen in perspective, with a shadow; free fall with
    restitution e at each bounce (handbook: successive apex heights h·e^(2n)). PNG frames,
    320 × 240, RGB.

``--video SECONDS`` writes instead one MPEG-4 video of the rod pendulum (``OUT/rod_pendulum.mp4``),
one long take as a user would record it, for trying the command line on a single recording.

These are synthetic scenes for the bench, not measurements of a real apparatus.
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

import cv2
import numpy as np
from scipy.integrate import solve_ivp

FPS, FRAMES, WIDTH, HEIGHT = 30.0, 90, 320, 240
NOISE_STD = 3.0      # camera noise, 8-bit grey levels
JPEG_QUALITY = 80
G = 9.81             # m/s², standard gravity


def _camera(img: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Sensor noise and 8-bit quantisation, as a camera would add them."""
    noisy = img.astype(np.float32) + rng.normal(0.0, NOISE_STD, img.shape)
    return np.clip(np.rint(noisy), 0, 255).astype(np.uint8)


def _write_trial(folder: Path, frames: list[np.ndarray], suffix: str) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    names = []
    for i, img in enumerate(frames):
        name = f"img{i:05d}{suffix}"
        params = [cv2.IMWRITE_JPEG_QUALITY, JPEG_QUALITY] if suffix == ".jpg" else []
        cv2.imwrite(str(folder / name), img, params)
        names.append(name)
    lines = ["frame,time_s"] + [f"{n},{i / FPS:.6f}" for i, n in enumerate(names)]
    (folder / "timestamps.csv").write_text("\n".join(lines) + "\n")


def _wall(rng: np.random.Generator) -> np.ndarray:
    """A light wall lit unevenly from one side (BGR)."""
    x = np.linspace(0.0, 1.0, WIDTH)[None, :, None]
    y = np.linspace(0.0, 1.0, HEIGHT)[:, None, None]
    base = np.array([205.0, 215.0, 222.0])  # warm off-white
    shade = 1.0 - 0.18 * x - 0.10 * (y - 0.5) ** 2
    return np.broadcast_to(base * shade, (HEIGHT, WIDTH, 3)).astype(np.float32)


def rod_pendulum(rng: np.random.Generator, frames_n: int = FRAMES) -> list[np.ndarray]:
    length_m, damping = 0.62, 0.08        # s⁻¹
    theta0 = rng.uniform(0.35, 1.0) * rng.choice([-1.0, 1.0])
    sol = solve_ivp(lambda t, y: [y[1], -(G / length_m) * math.sin(y[0]) - damping * y[1]],
                    (0.0, frames_n / FPS), [theta0, 0.0], t_eval=np.arange(frames_n) / FPS,
                    rtol=1e-9, atol=1e-9)
    pivot, rod_px = np.array([160.0, 38.0]), 150.0
    wall = _wall(rng)
    frames = []
    for th in sol.y[0]:
        img = wall.copy()
        cv2.rectangle(img, (140, 22), (180, 40), (90, 95, 100), -1, cv2.LINE_AA)      # bracket
        end = pivot + rod_px * np.array([math.sin(th), math.cos(th)])
        p0 = tuple(int(round(v * 16)) for v in pivot)
        p1 = tuple(int(round(v * 16)) for v in end)
        cv2.line(img, p0, p1, (40, 38, 35), 5, cv2.LINE_AA, shift=4)               # rod
        cv2.circle(img, p1, 9 * 16, (25, 25, 30), -1, cv2.LINE_AA, shift=4)         # end mass
        cv2.circle(img, p0, 4 * 16, (60, 60, 60), -1, cv2.LINE_AA, shift=4)         # axle
        frames.append(_camera(img, rng))
    return frames


def _floor(img: np.ndarray, horizon: int) -> None:
    """A checkered floor in one-point perspective below ``horizon`` (drawn in place)."""
    rows = np.arange(horizon, HEIGHT)
    depth = 40.0 / (rows - horizon + 12.0)               # 1/distance: squares shrink towards the horizon
    xs = np.arange(WIDTH) - WIDTH / 2
    u = np.floor(xs[None, :] * depth[:, None] / 14.0)
    v = np.floor(depth[:, None] * 3.0 + 0 * xs[None, :])
    check = ((u + v) % 2 == 0)
    img[horizon:] = np.where(check[..., None], [150.0, 160.0, 170.0], [70.0, 80.0, 95.0])


def ball_floor(rng: np.random.Generator, frames_n: int = FRAMES) -> list[np.ndarray]:
    e, radius = 0.8, 11.0
    floor_y = 200.0                                      # image row of the ball's lowest point at contact
    h0 = rng.uniform(90.0, 140.0)                        # drop height, px
    x0, vx = rng.uniform(70.0, 110.0), rng.uniform(25.0, 45.0) * rng.choice([-1.0, 1.0])
    if vx < 0:
        x0 = WIDTH - x0
    g_px = 900.0                                         # px/s² (sets the bounce time scale)
    t = np.arange(frames_n) / FPS
    # closed form between bounces: fall from h0, then each flight lasts e times the one before
    y = np.empty_like(t)
    t_hit, v_hit = math.sqrt(2 * h0 / g_px), math.sqrt(2 * g_px * h0)
    for i, ti in enumerate(t):
        if ti < t_hit:
            y[i] = h0 - 0.5 * g_px * ti ** 2
            continue
        tb, vb = t_hit, e * v_hit
        while ti > tb + 2 * vb / g_px and vb > 1.0:
            tb, vb = tb + 2 * vb / g_px, vb * e
        dt = ti - tb
        y[i] = max(vb * dt - 0.5 * g_px * dt ** 2, 0.0)
    base = np.broadcast_to(np.array([120.0, 105.0, 95.0]), (HEIGHT, WIDTH, 3)).astype(np.float32).copy()
    _floor(base, 150)
    frames = []
    for i in range(frames_n):
        img = base.copy()
        cx, cy = x0 + vx * t[i], floor_y - radius - y[i]
        shadow_w = int(radius * (1.2 - 0.4 * min(y[i] / 140.0, 1.0)))
        cv2.ellipse(img, (int(cx), int(floor_y + 2)), (shadow_w, 3), 0, 0, 360, (40, 45, 50), -1, cv2.LINE_AA)
        c = (int(round(cx * 16)), int(round(cy * 16)))
        cv2.circle(img, c, int(radius * 16), (40, 60, 210), -1, cv2.LINE_AA, shift=4)     # red ball
        spin = vx * t[i] / radius                                                     # rolling angle
        for k in (-0.5, 0.0, 0.5):                                                    # white stripes
            a = spin + k
            d = np.array([math.cos(a), math.sin(a)]) * radius * 0.9
            q0 = (int(round((cx - d[1]) * 16)), int(round((cy + d[0]) * 16)))
            q1 = (int(round((cx + d[1]) * 16)), int(round((cy - d[0]) * 16)))
            cv2.line(img, q0, q1, (235, 235, 235), 2, cv2.LINE_AA, shift=4)
        frames.append(_camera(img, rng))
    return frames


SCENES = {"rod_pendulum": (rod_pendulum, ".jpg"), "ball_floor": (ball_floor, ".png")}
LONG_TAKE = ("rod_pendulum",)  # the ball rolls out of view and comes to rest within a few seconds


def write_video(path: Path, frames: list[np.ndarray]) -> None:
    """One recording as an MPEG-4 video (OpenCV's "mp4v" encoder) at :data:`FPS`."""
    out = cv2.VideoWriter(str(path), cv2.VideoWriter_fourcc(*"mp4v"), FPS, (WIDTH, HEIGHT))
    for img in frames:
        out.write(img)
    out.release()


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="bench/foreign.py", description=__doc__.splitlines()[0])
    p.add_argument("out", type=Path, help="folder to write the scenes into (one sub-folder each)")
    p.add_argument("--trials", type=int, default=12)
    p.add_argument("--seed", type=int, default=7)
    p.add_argument("--video", type=float, default=0.0, metavar="SECONDS",
                   help="instead of trial folders, one video of this length (OUT/NAME.mp4) of each scene that "
                        "stays in view that long (the rod pendulum), as a user would record one long take")
    a = p.parse_args(argv)
    a.out.mkdir(parents=True, exist_ok=True)
    for name, (draw, suffix) in SCENES.items():
        rng = np.random.default_rng(a.seed)
        if a.video > 0 and name in LONG_TAKE:
            write_video(a.out / f"{name}.mp4", draw(rng, int(round(a.video * FPS))))
            print(f"wrote {a.out / (name + '.mp4')}: {a.video:g} s at {FPS:g} frames/s")
        if a.video > 0:
            continue
        for k in range(a.trials):
            _write_trial(a.out / f"foreign_{name}" / f"trial_{k:03d}", draw(rng), suffix)
        print(f"wrote {a.out / ('foreign_' + name)}: {a.trials} trials of {FRAMES} frames")
    return 0


if __name__ == "__main__":
    sys.exit(main())
