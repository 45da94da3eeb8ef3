"""The ``ball`` rig: bounces against handbook kinematics, the settling rule, the posts, the
pixel truth against the drawn frames."""

from __future__ import annotations

import math

import numpy as np
import pytest

from kinecast.errors import KinecastError
from kinecast.rigs import RIGS, render_trials

BALL = RIGS["ball"]
P = BALL.resolve()
G, E, SETTLE = P["gravity"], P["restitution"], P["settle_m"]


def closed_form_height(h0: float, t: np.ndarray, g: float, e: float, settle: float) -> np.ndarray:
    """Height of a ball dropped from rest at h0 onto a floor with restitution e (handbook
    kinematics): first impact at t1 = sqrt(2 h0 / g) with speed v1 = g t1; the n-th rebound leaves
    at e^n v1 and flies 2 e^n v1 / g, climbing (e^n v1)² / 2g = h0 e^(2n). Rebounds that would climb
    less than ``settle`` are the rig's documented rest rule (the ball then stays at 0)."""
    t1 = math.sqrt(2 * h0 / g)
    out = np.where(t < t1, h0 - g * t**2 / 2, 0.0)
    start, speed = t1, e * g * t1
    while speed**2 / (2 * g) >= settle:
        tau = t - start
        flying = (tau >= 0) & (tau < 2 * speed / g)
        out = np.where(flying, speed * tau - g * tau**2 / 2, out)
        start, speed = start + 2 * speed / g, e * speed
    return out


def impacts(states: np.ndarray) -> np.ndarray:
    """Sample indices just after each floor impact (upward velocity turns from < 0 to >= 0)."""
    v = states[:, 3]
    return np.flatnonzero((v[:-1] < 0) & (v[1:] >= 0)) + 1


@pytest.fixture(scope="module")
def dense():
    """One drop from rest, sampled every DT seconds for 4 s."""
    h0 = 0.9
    times = np.arange(0.0, 4.0, DT)
    return h0, times, BALL.simulate(P, [0.1, h0, 0.2, 0.0], times)


DT = 1e-4


def test_rendered_truth_is_the_closed_form_bouncing_parabola():
    trial = render_trials("ball", frames=120, fps=30.0, seed=4)[0]
    h0 = trial.initial["height"]
    assert trial.initial["vheight"] == 0.0 and 0.5 <= h0 <= 1.0
    expected = closed_form_height(h0, trial.times, G, E, SETTLE)
    # RK4 integrates a constant acceleration exactly and impacts are located to float precision,
    # so the truth matches the closed form to rounding (tolerance 1e-9 m, far below a pixel).
    assert np.max(np.abs(trial.truth["height"] - expected)) < 1e-9
    assert np.ptp(trial.truth["ball_y_px"]) > 20              # it visibly falls and bounces


def test_first_impact_apexes_and_flight_times_follow_the_handbook(dense):
    h0, times, states = dense
    hits = impacts(states)
    # First impact of a drop from rest: t1 = sqrt(2 h0 / g) (handbook kinematics); the grid is DT.
    assert abs(times[hits[0]] - math.sqrt(2 * h0 / G)) <= DT
    bounces = 0
    for n, (a, b) in enumerate(zip(hits[:-1], hits[1:]), start=1):
        if states[b - 1, 3] == 0.0:            # the ball came to rest instead of landing again
            break
        h_n = h0 * E ** (2 * n)                # rebound speed e·v, apex v²/2g: h_n = h0·e^(2n)
        # Apex sampled on a DT grid is low by at most g·DT²/8 (parabola around its top).
        assert abs(states[a:b, 1].max() - h_n) < 1e-7
        # Flight time between impacts t_n = 2·sqrt(2 h_n / g) (handbook kinematics).
        assert abs((times[b] - times[a]) - 2 * math.sqrt(2 * h_n / G)) <= 2 * DT
        bounces += 1
    assert bounces >= 5                        # several bounces checked, not just one


def test_energy_falls_by_e_squared_per_bounce(dense):
    h0, times, states = dense
    # Mechanical energy per unit mass in the vertical, g·h + v²/2, is constant in free flight and a
    # rebound at e·v keeps the fraction e² of it (definition of restitution; handbook mechanics).
    energy = G * states[:, 1] + states[:, 3] ** 2 / 2
    hits = impacts(states)
    flights = [energy[a:b] for a, b in zip(np.r_[0, hits[:-1]], hits) if b - a > 2]
    for piece in flights:
        assert np.ptp(piece) < 1e-9 * G
    ratios = [after[0] / before[0] for before, after in zip(flights[:-1], flights[1:])]
    assert len(ratios) >= 5
    np.testing.assert_allclose(ratios, E**2, rtol=1e-9)
    assert abs(flights[0][0] - G * h0) < 1e-12 * G


def test_settles_at_rest_without_chatter(dense):
    h0, times, states = dense
    rest = np.flatnonzero((states[:, 1] == 0.0) & (states[:, 3] == 0.0))
    assert rest.size and np.all(np.diff(rest) == 1) and rest[-1] == len(times) - 1   # stays put
    # The last rebound taken climbs at least settle_m; the next would climb h0·e^(2n) < settle_m.
    kept = [n for n in range(1, 100) if h0 * E ** (2 * n) >= SETTLE]
    assert len(impacts(states)) == len(kept) + 1            # kept rebounds, then the resting impact
    # Time to rest: t1 + Σ flight times of the kept rebounds (geometric series; handbook kinematics).
    t1 = math.sqrt(2 * h0 / G)
    t_rest = t1 + sum(2 * E**n * G * t1 / G for n in kept)
    assert abs(times[rest[0]] - t_rest) <= DT
    # A long render (far more bounces than one RK4 step can hold) still runs: no Zeno pile-up.
    trial = render_trials("ball", frames=600, fps=60.0, seed=1, params={"settle_m": 1e-4})[0]
    assert trial.truth["height"][-1] == 0.0


def test_posts_reverse_sideways_velocity_with_restitution():
    trial = render_trials("ball", frames=240, fps=60.0, seed=2, params={"speed_max": 3.0,
                                                                        "room_m": 1.0})[0]
    side = 1.0 / 2 - P["radius_m"]
    x, vx = trial.truth["x"], trial.truth["vx"]
    assert np.all(np.abs(x) <= side + 1e-12)
    # No drag: |vx| only changes at a post, by the factor e each time (common practice).
    steps = np.abs(vx) / abs(trial.initial["vx"])
    hits = np.round(np.log(steps) / np.log(E))
    np.testing.assert_allclose(steps, E**hits, rtol=1e-12)
    assert hits.max() >= 2


def test_pixel_truth_is_the_centroid_of_the_drawn_ball():
    trial = render_trials("ball", frames=40, size=64, seed=3)[0]
    f = trial.frames.astype(np.float64)
    # Floor, tile lines, posts and background are neutral grey (R = B) and the ball is yellow, so
    # R − B is the ball's coverage alone; the centroid of a disc is its centre (geometry).
    w = np.clip(f[..., 0] - f[..., 2], 0, None)
    yy, xx = np.mgrid[0:64, 0:64]
    mass = w.sum(axis=(1, 2))
    cx, cy = (w * xx).sum(axis=(1, 2)) / mass, (w * yy).sum(axis=(1, 2)) / mass
    assert np.max(np.abs(cx - trial.truth["ball_x_px"])) < 0.05
    assert np.max(np.abs(cy - trial.truth["ball_y_px"])) < 0.05


def test_defaults_give_several_bounces_in_a_few_seconds_at_30_fps():
    # Design target (ours): at 30 fps, at least 3 impacts within 3.5 s and 8+ frames per flight.
    for seed in range(3):
        truth = render_trials("ball", frames=105, fps=30.0, seed=seed, size=16)[0].truth
        v = truth["vheight"]
        hits = np.flatnonzero((v[:-1] < 0) & (v[1:] >= 0))
        assert len(hits) >= 3 and hits[0] >= 8


@pytest.mark.parametrize("params, problem", [
    ({"settle_m": 0.0}, "settle_m must be at least"),
    ({"restitution": 1.5}, "restitution"),
    ({"drop_max_m": 5.0}, "leave the view"),
    ({"room_m": 0.1}, "fits between the posts"),
])
def test_bad_parameters_are_refused(params, problem):
    with pytest.raises(KinecastError, match=problem):
        render_trials("ball", frames=2, params=params)
