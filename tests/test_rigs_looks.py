"""Rig looks: ``classic`` is the old rendering unchanged, every look draws every rig with the
object visible, ``rod`` draws extended objects, ``mixed`` picks reproducibly per trial, bad names
are refused."""

from __future__ import annotations

import hashlib
from collections import Counter

import numpy as np
import pytest

try:
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

from kinecast.cli import main
from kinecast.errors import EXIT_BAD_INPUT, KinecastError
from kinecast.rigs import LOOKS, RIGS, Camera, render_trials, write_rig
from kinecast.rigs.render import empty_scene, trial_look

# ITU-R BT.601 luma weights (open standard).
LUMA = np.array([0.299, 0.587, 0.114])
# The object must differ from the empty scene behind it by this much luma at its centre (a fifth of
# full scale, 51 grey levels: our visibility margin, well above noise and drift).
MIN_CONTRAST = 0.2
BUSY = Camera(noise=0.02, blur=2, vignette=0.3, texture=0.4, flicker=0.02)

# SHA-256 of the frames of render_trials(rig, trials=2, frames=8, size=32, seed=3, camera=...)
# computed with the renderer as it was before looks existed (same pinned numpy / OpenCV).
BEFORE_LOOKS = {
    ("pendulum", False): "bfee38c820dd96a508b0ceb4ad5ac90380333a81757a847b48a5873ea7dd5ca1",
    ("pendulum", True): "6b1f31ced79b289f8e744ce2c067448d5a87ace84274c9ce1717bcf11ee0a913",
    ("spring", False): "5e8bd299443b8c9a0f8830a6863d51468126e63aaf6a1b8d2dad4bc015feb474",
    ("spring", True): "024328ce2eee5dbf6d35a7ec352cb3afb0927b0f3fd115b2f07739441bf692b9",
    ("airtable", False): "eb5f2745638f101171222c83b9a42ce6d5b0b7ec1524e90a6b5fbe95667855ff",
    ("airtable", True): "3412ecc26a70573f1cc1c8e28464650bc7479c38c86f6786db2a111fb7bfb5f2",
}


def frames_hash(trials) -> str:
    return hashlib.sha256(b"".join(t.frames.tobytes() for t in trials)).hexdigest()


def centres(trial, size: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """Truth centre (x, y) in pixels of each moving object of a trial."""
    t = trial.truth
    if trial.name == "pendulum":
        return [(t["bob_x_px"], t["bob_y_px"])]
    if trial.name == "spring":   # the weight hangs on the frame's vertical centre line
        return [(np.full_like(t["weight_y_px"], (size - 1) / 2), t["weight_y_px"])]
    if trial.name == "ball":
        return [(t["ball_x_px"], t["ball_y_px"])]
    return [(t[f"x_{i}_px"], t[f"y_{i}_px"]) for i in range(int(trial.params["pucks"]))]


def scene_luma(trial, size: int) -> np.ndarray:
    look = LOOKS[trial.look]
    return empty_scene(RIGS[trial.name], trial.params, trial.seed, size, trial.camera, look).image() @ LUMA


@pytest.mark.parametrize("rig, busy", sorted(BEFORE_LOOKS))
def test_classic_is_the_rendering_from_before_looks_and_the_default(rig, busy):
    settings = dict(trials=2, frames=8, size=32, seed=3, camera=BUSY if busy else Camera())
    assert frames_hash(render_trials(rig, **settings)) == BEFORE_LOOKS[rig, busy]
    assert frames_hash(render_trials(rig, look="classic", **settings)) == BEFORE_LOOKS[rig, busy]


def test_default_look_is_classic_for_every_rig_and_in_rig_toml(tmp_path):
    for rig in RIGS:
        plain = render_trials(rig, trials=2, frames=5, size=24, seed=1)
        classic = render_trials(rig, trials=2, frames=5, size=24, seed=1, look="classic")
        assert frames_hash(plain) == frames_hash(classic) and plain[0].look == "classic"
    folder = write_rig("spring", tmp_path / "rig", frames=3, size=16)[0]
    meta = tomllib.loads((folder / "rig.toml").read_text())     # TOML 1.0 (tomllib)
    assert meta["look"] == "classic" and meta["rig"] == "spring"


@pytest.mark.parametrize("rig", sorted(RIGS))
@pytest.mark.parametrize("look", sorted(LOOKS))
def test_every_look_draws_every_rig_with_the_object_visible(rig, look):
    size = 48
    trials = render_trials(rig, trials=2, frames=30, size=size, seed=7, look=look)
    for trial in trials:
        assert trial.look == look and trial.frames.shape == (30, size, size, 3)
        scene = scene_luma(trial, size)
        luma = trial.frames.astype(np.float64) @ LUMA / 255.0
        for xs, ys in centres(trial, size):
            col, row = np.rint(xs).astype(int), np.rint(ys).astype(int)
            contrast = np.abs(luma[np.arange(len(col)), row, col] - scene[row, col])
            assert contrast.min() > MIN_CONTRAST, (rig, look, contrast.min())
    grey = render_trials(rig, frames=3, size=size, seed=7, look=look, channels="grey")[0]
    assert grey.frames.shape == (3, size, size, 1)


def test_physics_and_truth_do_not_depend_on_the_look():
    for rig in RIGS:
        ref = render_trials(rig, trials=2, frames=10, size=24, seed=5)
        for look in LOOKS:
            other = render_trials(rig, trials=2, frames=10, size=24, seed=5, look=look)
            for a, b in zip(ref, other):
                np.testing.assert_array_equal(a.times, b.times)
                assert a.truth.keys() == b.truth.keys()
                for key in a.truth:
                    np.testing.assert_array_equal(a.truth[key], b.truth[key])
            assert frames_hash(ref) != frames_hash(other) or look == "classic"


def elongation(weight: np.ndarray) -> float:
    """sqrt of the ratio of principal second moments of area of an image weight: 1 for a disc or
    square, length/width for a thin bar (second moments of area; handbook geometry)."""
    yy, xx = np.mgrid[0:weight.shape[0], 0:weight.shape[1]]
    m = weight.sum()
    dx, dy = xx - (weight * xx).sum() / m, yy - (weight * yy).sum() / m
    cov = np.array([[(weight * dx * dx).sum(), (weight * dx * dy).sum()],
                    [(weight * dx * dy).sum(), (weight * dy * dy).sum()]]) / m
    low, high = np.linalg.eigvalsh(cov)
    return float(np.sqrt(high / low))


# Channel differences that isolate each rig's first object (its colour against neutral-grey parts).
ISOLATE = {"pendulum": (0, 1), "spring": (2, 0), "airtable": (0, 1), "ball": (0, 2)}


@pytest.mark.parametrize("rig", sorted(RIGS))
def test_rod_look_draws_extended_objects(rig):
    params = {"pucks": 1} if rig == "airtable" else None
    a, b = ISOLATE[rig]
    for look, lo, hi in (("classic", 0.95, 1.1), ("rod", 1.6, np.inf)):
        trial = render_trials(rig, frames=12, size=96, seed=7, look=look, params=params)[0]
        f = trial.frames.astype(np.float64)
        for frame in f[::4]:
            ratio = elongation(np.clip(frame[..., a] - frame[..., b], 0, None))
            assert lo < ratio < hi, (rig, look, ratio)


def test_dark_on_light_reverses_the_contrast():
    for rig in RIGS:
        for look, sign in (("classic", 1), ("dark_on_light", -1)):
            trial = render_trials(rig, frames=6, size=48, seed=2, look=look)[0]
            luma = trial.frames.astype(np.float64) @ LUMA / 255.0
            scene = scene_luma(trial, 48)
            xs, ys = centres(trial, 48)[0]
            col, row = np.rint(xs).astype(int), np.rint(ys).astype(int)
            assert np.all(sign * (luma[np.arange(6), row, col] - scene[row, col]) > MIN_CONTRAST)
            assert (scene.mean() > 0.5) == (look == "dark_on_light")


def test_gradient_is_a_linear_ramp_and_textured_is_a_pattern():
    pend = RIGS["pendulum"]
    params = pend.resolve()
    ramp = empty_scene(pend, params, 3, 64, Camera(), LOOKS["gradient"]).image() @ LUMA
    yy, xx = np.mgrid[0:64, 0:64]
    design = np.stack([np.ones(64 * 64), xx.ravel(), yy.ravel()], axis=1)
    coef, *_ = np.linalg.lstsq(design, ramp.ravel(), rcond=None)     # least-squares plane
    residual = ramp.ravel() - design @ coef
    assert np.ptp(ramp) > 0.3 and np.abs(residual).max() < 1e-5      # a plane: linear lighting
    flat = empty_scene(pend, params, 3, 64, Camera(), LOOKS["classic"]).image() @ LUMA
    pattern = empty_scene(pend, params, 3, 64, Camera(), LOOKS["textured"]).image() @ LUMA
    assert np.ptp(flat) < 1e-6 and pattern.std() > 0.05
    # A pattern, not pixel noise: neighbouring pixels are strongly correlated (Pearson r of each
    # pixel with its right-hand neighbour; white noise would give r ≈ 0).
    assert np.corrcoef(pattern[:, :-1].ravel(), pattern[:, 1:].ravel())[0, 1] > 0.5
    # The background is one per (seed, look): a fixed camera, the same for every trial.
    again = empty_scene(pend, params, 3, 64, Camera(), LOOKS["textured"]).image() @ LUMA
    other = empty_scene(pend, params, 4, 64, Camera(), LOOKS["textured"]).image() @ LUMA
    np.testing.assert_array_equal(pattern, again)
    assert np.abs(pattern - other).max() > 0.05


def test_drift_noise_drifts_the_light_a_few_percent_and_adds_sensor_noise():
    clean = render_trials("spring", frames=90, size=48, seed=6)[0]
    noisy = render_trials("spring", frames=90, size=48, seed=6, look="drift_noise")[0]
    a = clean.frames.astype(np.float64)
    b = noisy.frames.astype(np.float64)
    gain = b.mean(axis=(1, 2, 3)) / a.mean(axis=(1, 2, 3))
    slope, start = np.polyfit(noisy.times / noisy.times[-1], gain, 1)   # least-squares line
    assert abs(start - 1) < 0.005 and 0.025 < abs(slope) < 0.065        # drift of 3-6 % over the trial
    residual = b - a * (start + slope * noisy.times / noisy.times[-1])[:, None, None, None]
    # Gaussian noise of 0.02 full scale = 5.1 levels, plus two roundings to whole levels
    # (uniform quantisation, variance 1/12 each; common practice): about 5.12 levels.
    assert 4.8 < residual.std() < 5.5


def test_mixed_is_reproducible_independent_of_the_trial_count_and_varied(tmp_path):
    eight = render_trials("pendulum", trials=8, frames=4, size=24, seed=11, look="mixed")
    again = render_trials("pendulum", trials=8, frames=4, size=24, seed=11, look="mixed")
    three = render_trials("pendulum", trials=3, frames=4, size=24, seed=11, look="mixed")
    assert [t.look for t in eight] == [t.look for t in again]
    assert frames_hash(eight) == frames_hash(again)
    assert [t.look for t in three] == [t.look for t in eight[:3]]
    assert frames_hash(three) == frames_hash(eight[:3])
    assert len({t.look for t in eight}) >= 3
    folders = write_rig("pendulum", tmp_path / "rig", trials=8, frames=4, size=24, seed=11, look="mixed")
    assert [tomllib.loads((f / "rig.toml").read_text())["look"] for f in folders] == \
        [t.look for t in eight]
    # Each look is equally likely: 600 trials, 100 expected per look, binomial sd ≈ 9.1; allow ±4.4 sd.
    counts = Counter(trial_look("mixed", 0, k).name for k in range(600))
    assert set(counts) == set(LOOKS) and all(abs(c - 100) < 40 for c in counts.values())


def test_unknown_look_is_refused_naming_the_allowed_ones(tmp_path, capsys):
    with pytest.raises(KinecastError, match="unknown look: allowed classic, dark_on_light, .*mixed"):
        render_trials("pendulum", frames=2, look="sparkly")
    with pytest.raises(KinecastError, match="unknown look"):
        write_rig("pendulum", tmp_path / "api", frames=2, look="Classic")
    assert not (tmp_path / "api").exists()
    out = tmp_path / "cli"
    code = main(["rig", "pendulum", "--out", str(out), "--frames", "2", "--size", "16",
                 "--look", "sparkly"])
    err = capsys.readouterr().err
    assert code == EXIT_BAD_INPUT == 2
    assert err.count("\n") == 1 and err.startswith("kinecast: error:") and "Traceback" not in err
    assert "sparkly" in err and "allowed classic" in err and not out.exists()


def test_cli_look_option_writes_the_look(tmp_path, capsys):
    out = tmp_path / "rig"
    assert main(["rig", "ball", "--out", str(out), "--frames", "3", "--size", "16", "--trials", "2",
                 "--look", "rod"]) == 0
    capsys.readouterr()
    for k in range(2):
        meta = tomllib.loads((out / f"trial_{k:03d}" / "rig.toml").read_text())
        assert meta["look"] == "rod" and meta["rig"] == "ball"
