"""Physics of the synthetic rigs against closed forms, handbook formulas and scipy."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.special import ellipk

from kinecast.rigs import RIGS, integrate, render_trials


def zero_crossing_times(t: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Times where x changes sign, by linear interpolation between samples."""
    i = np.flatnonzero(np.sign(x[:-1]) * np.sign(x[1:]) < 0)
    return t[i] - x[i] * (t[i + 1] - t[i]) / (x[i + 1] - x[i])


def measured_period(times: np.ndarray, theta: np.ndarray) -> float:
    """Mean period from zero crossings: consecutive crossings are half a period apart."""
    z = zero_crossing_times(times, theta)
    assert len(z) >= 6, "need several swings to measure a period"
    return 2 * float(np.mean(np.diff(z)))


PEND = {"length_m": 0.25, "gravity": 9.81, "damping": 0.0}


@pytest.mark.parametrize("amplitude_deg", [60.0, 80.0])
def test_pendulum_large_amplitude_period_matches_elliptic_integral(amplitude_deg):
    params = dict(PEND, amp_min_deg=amplitude_deg, amp_max_deg=amplitude_deg)
    trial = render_trials("pendulum", frames=150, size=16, params=params)[0]
    got = measured_period(trial.times, trial.truth["theta"])
    # Exact period of the undamped pendulum, T = 4·sqrt(L/g)·K(k), k = sin(θ0/2), K the complete
    # elliptic integral of the first kind (Abramowitz & Stegun 17.3; any mechanics text);
    # scipy.special.ellipk takes the parameter m = k².
    k2 = math.sin(math.radians(amplitude_deg) / 2) ** 2
    exact = 4 * math.sqrt(PEND["length_m"] / PEND["gravity"]) * ellipk(k2)
    # The brief asks for 0.5 %; zero crossings interpolated at 30 fps are far better than that.
    assert got == pytest.approx(exact, rel=1e-4)
    # and large swings really are slower than the small-angle formula (so the check has teeth)
    assert got > 1.07 * 2 * math.pi * math.sqrt(PEND["length_m"] / PEND["gravity"])


def test_pendulum_small_angle_period():
    params = dict(PEND, amp_min_deg=2.0, amp_max_deg=2.0)
    trial = render_trials("pendulum", frames=150, size=16, params=params)[0]
    got = measured_period(trial.times, trial.truth["theta"])
    # Small-angle period T = 2π·sqrt(L/g) (any mechanics text); at 2° the exact period is longer by
    # a factor ≈ 1 + θ0²/16 ≈ 1.00008, well inside 0.5 %.
    assert got == pytest.approx(2 * math.pi * math.sqrt(PEND["length_m"] / PEND["gravity"]), rel=5e-3)


def test_pendulum_damping_decays_amplitude_like_exp_minus_bt_over_2():
    b = 0.4
    trial = render_trials("pendulum", frames=300, size=16,
                          params={"damping": b, "amp_min_deg": 3.0, "amp_max_deg": 3.0})[0]
    t, theta = trial.times, trial.truth["theta"]
    energy_like = theta ** 2 + trial.truth["omega"] ** 2 / (PEND["gravity"] / PEND["length_m"])
    # Lightly damped small oscillation: amplitude ∝ exp(−b·t/2), so θ² + ω²/ω0² ∝ exp(−b·t)
    # averaged over a cycle (closed form of the linear damped oscillator, any mechanics text).
    slope = np.polyfit(t, np.log(energy_like), 1)[0]
    assert slope == pytest.approx(-b, rel=0.02)


def spring_closed_form(t, x0, v0, omega0, gamma):
    """x(t) = A·e^(−γt)·cos(ω_d·t + φ), ω_d = sqrt(ω0² − γ²) (underdamped oscillator, closed
    form, any mechanics text), with A, φ from x(0) = x0, x'(0) = v0; and its derivative."""
    wd = math.sqrt(omega0 ** 2 - gamma ** 2)
    a_cos, a_sin = x0, -(v0 + gamma * x0) / wd
    amp, phase = math.hypot(a_cos, a_sin), math.atan2(a_sin, a_cos)
    env = amp * np.exp(-gamma * t)
    x = env * np.cos(wd * t + phase)
    v = -gamma * x - env * wd * np.sin(wd * t + phase)
    return x, v, amp


def test_spring_trajectory_matches_damped_oscillator_closed_form():
    params = {"omega0": 8.0, "gamma": 0.6}
    trial = render_trials("spring", frames=120, size=16, params=params)[0]
    x0 = trial.initial["x"]
    x, v, amp = spring_closed_form(trial.times, x0, 0.0, 8.0, 0.6)
    assert np.max(np.abs(trial.truth["x"] - x)) <= 1e-6 * amp
    assert np.max(np.abs(trial.truth["v"] - v)) <= 1e-6 * amp * 8.0


def test_spring_with_initial_velocity_and_backwards_in_time():
    rig = RIGS["spring"]
    p = rig.resolve({"omega0": 5.0, "gamma": 0.3})
    t = np.linspace(-1.0, 3.0, 81)
    states = rig.simulate(p, [0.05, -0.4], t)
    x, v, amp = spring_closed_form(t, 0.05, -0.4, 5.0, 0.3)
    assert np.max(np.abs(states[:, 0] - x)) <= 1e-6 * amp
    assert np.max(np.abs(states[:, 1] - v)) <= 1e-6 * amp * 5.0


@pytest.mark.parametrize("name,y0", [("pendulum", [math.radians(80), 0.5]), ("spring", [0.07, 0.2])])
def test_rk4_agrees_with_scipy_solve_ivp(name, y0):
    rig = RIGS[name]
    p = rig.resolve({"damping": 0.3} if name == "pendulum" else {"gamma": 0.3})
    t = np.linspace(0, 4.0, 121)
    ours = rig.simulate(p, y0, t)
    # Reference: scipy.integrate.solve_ivp, DOP853 at rtol 1e-10 (scipy documentation).
    ref = solve_ivp(rig.rhs(p), (0, 4.0), y0, method="DOP853", t_eval=t, rtol=1e-10, atol=1e-12)
    assert ref.success
    assert np.max(np.abs(ours - ref.y.T)) < 1e-8


def test_rk4_global_error_is_fourth_order():
    # Classical RK4 has global error O(h⁴) (Butcher 2016, ch. 3): halving h divides it by ≈ 16.
    # Test problem y'' = −y, y(0) = 1, y'(0) = 0, exact y = cos t.
    def rhs(t, y):
        return np.array([y[1], -y[0]])

    errors = [abs(integrate(rhs, [1.0, 0.0], [4.0], max_step=h)[0, 0] - math.cos(4.0)) for h in (0.2, 0.1)]
    assert 14.0 < errors[0] / errors[1] < 18.0


def _bounces(v: np.ndarray) -> np.ndarray:
    """Sample indices i where a velocity component changes sign between i and i+1."""
    return np.flatnonzero(np.sign(v[:-1]) * np.sign(v[1:]) < 0)


def test_airtable_rail_bounce_restitution_and_free_flight():
    rig = RIGS["airtable"]
    e, r, side = 0.8, 0.05, 1.0
    p = rig.resolve({"pucks": 1, "restitution": e, "drag": 0.0, "radius_m": r, "table_m": side})
    t = np.linspace(0, 6.0, 6001)
    s = rig.simulate(p, [0.3, 0.6, 0.9, -0.7], t)
    x, y, vx, vy = s.T
    speed = np.hypot(vx, vy)
    hits_x, hits_y = _bounces(vx), _bounces(vy)
    assert len(hits_x) >= 3 and len(hits_y) >= 3
    # The puck centre never leaves the table (inner rails at r and side − r).
    assert x.min() >= r - 1e-12 and x.max() <= side - r + 1e-12
    assert y.min() >= r - 1e-12 and y.max() <= side - r + 1e-12
    for i in hits_x:
        if i in hits_y:
            continue
        # Wall bounce: normal velocity reverses and scales by e, tangential kept (common practice).
        assert vx[i + 1] == pytest.approx(-e * vx[i], rel=1e-12)
        assert vy[i + 1] == pytest.approx(vy[i], rel=1e-12)
        # Free flight at constant velocity (no drag): extrapolate to the rail, then out again at
        # the reflected velocity (kinematics) — checks the located contact time.
        wall = side - r if vx[i] > 0 else r
        tc = t[i] + (wall - x[i]) / vx[i]
        assert t[i] <= tc <= t[i + 1]
        assert x[i + 1] == pytest.approx(wall + vx[i + 1] * (t[i + 1] - tc), abs=1e-9)
    # Speed constant between bounces (no drag): it changes only across bounce intervals.
    bounce = np.zeros(len(t) - 1, bool)
    bounce[np.r_[hits_x, hits_y]] = True
    steps = np.abs(np.diff(speed))
    assert steps[~bounce].max() < 1e-12
    assert steps[bounce].min() > 1e-3


def test_airtable_drag_decays_speed_exponentially():
    rig = RIGS["airtable"]
    mu = 0.5
    p = rig.resolve({"pucks": 1, "restitution": 1.0, "drag": mu})
    t = np.linspace(0, 4.0, 201)
    s = rig.simulate(p, [0.5, 0.5, 1.5, 0.9], t)
    # Linear drag v' = −μ·v gives |v(t)| = |v0|·e^(−μt) (closed form); elastic bounces (e = 1)
    # keep the speed, so the law holds through them.
    assert len(_bounces(s[:, 2])) >= 1
    expected = math.hypot(1.5, 0.9) * np.exp(-mu * t)
    assert np.max(np.abs(np.hypot(s[:, 2], s[:, 3]) / expected - 1)) < 1e-9


def test_airtable_backwards_through_a_bounce_is_undone_forwards():
    rig = RIGS["airtable"]
    p = rig.resolve({"pucks": 1, "restitution": 0.7, "drag": 0.1})
    y0 = np.array([0.06, 0.5, 0.8, 0.1])   # just left the left rail, moving right
    back = rig.simulate(p, y0, [-0.5])[0]
    assert back[2] < 0                       # before the bounce it was moving left, faster
    assert abs(back[2]) > 0.8 / 0.7 * 0.9
    # Integrating forwards from the earlier state reproduces the state at t = 0 (a bounce maps
    # v_n → −e·v_n, so backwards in time it must map v_n → −v_n/e).
    again = integrate(rig.rhs(p), back, [0.5], rig.max_step(p), event=rig.event(p))[0]
    assert np.allclose(again, y0, atol=1e-10)


def test_truth_is_the_state_at_each_jittered_capture_time():
    from kinecast.rigs import Camera

    trial = render_trials("pendulum", frames=40, size=16, camera=Camera(jitter=0.005))[0]
    rig = RIGS["pendulum"]
    ref = solve_ivp(rig.rhs(trial.params), (0, trial.times[-1]), [trial.initial["theta"], 0.0],
                    method="DOP853", t_eval=trial.times, rtol=1e-11, atol=1e-12)
    assert np.max(np.abs(trial.truth["theta"] - ref.y[0])) < 1e-8
