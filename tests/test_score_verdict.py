"""Honest scores: the background-only baseline, the object horizon, region SSIM and the verdict.

Scores come from real ``evaluate`` / ``score_prediction`` calls on clips rendered in memory (the
pendulum rig, and anti-aliased discs in closed-form uniform motion), never from typed-in numbers.
Outside references are named beside each check.
"""

import numpy as np
import pytest
import torch
from skimage.metrics import structural_similarity

from kinecast import config as C
from kinecast.model import build_model, time_scale_from_times
from kinecast.rigs import render_trials
from kinecast.score import background_only, median_background, object_horizon, object_region, ssim
from kinecast.score.evaluate import BASELINES, evaluate, score_prediction
from kinecast.score.verdict import beats, judge_recordings, verdict
from test_score_tracks import render_disc

SIZE = 64
K = 3  # context frames (model.velocity_frames default)
BG = np.full((1, SIZE, SIZE), 0.2, np.float32)


@pytest.fixture(scope="module")
def recs():
    trials = render_trials("pendulum", trials=2, frames=40, seed=4, size=SIZE, fps=20.0)
    return [t.recording() for t in trials]


@pytest.fixture(scope="module")
def cfg(recs):
    out = C.apply_overrides(C.Config(), [f"data.size={SIZE}", "model.enc_channels=8",
                                         "model.dec_channels=8", "model.hidden=16"])
    out.solver.time_scale = time_scale_from_times([r.times for r in recs], out.solver.units_per_frame)
    return out


def still_model(cfg, recs):
    """A model that learned nothing: its decoder adds nothing, so every frame it draws is its
    median background (the model's mean frame is sigmoid(logit(b) + decoder(s)); see
    kinecast.model.latent_ode)."""
    model = build_model(cfg, recs[0].frames.shape[1]).eval()
    model.set_background(torch.from_numpy(median_background(np.concatenate([r.frames for r in recs]))))
    model.decoder.register_forward_hook(lambda module, inputs, out: out * 0.0)
    return model


def test_background_only_is_the_background_exactly():
    # Definition of the baseline: every forecast frame is the given background, bit for bit; without
    # one, the per-pixel median of the context (numpy.median as the reference).
    rng = np.random.default_rng(0)
    context = rng.random((5, 3, 8, 9)).astype(np.float32)
    bg = rng.random((3, 8, 9)).astype(np.float32)
    out = background_only(context, 4, background=bg)
    assert out.shape == (4, 3, 8, 9) and all(np.array_equal(f, bg) for f in out)
    assert np.array_equal(background_only(context, 2)[1], np.median(context, axis=0))
    assert "background_only" in BASELINES


def test_region_ssim_is_skimage_map_averaged_over_the_object():
    # scikit-image's full SSIM map (structural_similarity(..., full=True), Wang et al. 2004), averaged
    # over the object region inside the border that the mean SSIM also leaves out (3 px for a 7 px
    # window). For the whole frame as the region it is the ordinary mean SSIM.
    truth = render_disc([(30.0, 30.0)], radius=3.7)
    pred = render_disc([(31.0, 30.0)], radius=3.7)
    region = object_region(pred, truth, BG)
    _, smap = structural_similarity(truth[0, 0], pred[0, 0], data_range=1.0, full=True)
    inner = np.zeros_like(region[0])
    inner[3:-3, 3:-3] = True
    assert ssim(pred, truth, 7, region)[0] == pytest.approx(smap[region[0] & inner].mean(), abs=1e-4)
    everywhere = np.ones_like(region)
    assert ssim(pred, truth, 7, everywhere)[0] == pytest.approx(ssim(pred, truth, 7)[0], abs=1e-12)
    # a 1 px shift of a 3.7 px disc keeps whole-frame SSIM high but not the object's
    assert ssim(pred, truth, 7)[0] > 0.95 and ssim(pred, truth, 7, region)[0] < 0.9


def test_object_horizon_of_a_frozen_disc():
    # Uniform motion x = x0 + v t (closed form) at v = 0.6 px per frame; a forecast frozen at the last
    # context position is j * 0.6 px off at forecast frame j, so it stays within 2 px for j <= 3.33:
    # 3 frames. The truth itself stays on for the whole forecast; a forecast without an object for
    # none of it. Centroids are accurate to 0.02 px (test_score_tracks), far from these edges.
    cfg = C.Config()
    times = np.arange(15) * 0.05
    frames = render_disc(np.c_[10.0 + 0.6 * np.arange(15), np.full(15, 32.0)], radius=3.7)
    truth, t, origin = frames[K:], times[K:], times[K - 1]
    present = np.ones(len(t), bool)
    frozen = np.repeat(frames[K - 1:K], len(t), axis=0)
    empty = background_only(frames[:K], len(t), background=BG)
    got = {name: score_prediction(p, truth, present, t, origin, cfg, BG)[1]
           for name, p in (("frozen", frozen), ("truth", truth), ("empty", empty))}
    assert got["frozen"]["object_horizon_frames"] == 3
    assert got["frozen"]["object_horizon_s"] == pytest.approx(t[2] - origin)
    assert got["truth"]["object_horizon_frames"] == len(t) == got["truth"]["valid_horizon_frames"]
    assert got["empty"]["object_horizon_frames"] == 0 and got["empty"]["valid_horizon_frames"] == 0
    assert got["empty"]["missed_object_share"] == 1.0 and got["truth"]["missed_object_share"] == 0.0
    # the function on its own: NaN (no object) ends the horizon like a too-large error
    assert object_horizon([0.5, 1.9, np.nan, 0.1], [0.1, 0.2, 0.3, 0.4], 2.0, origin=0.0) == (2, 0.2)


def test_model_drawing_only_the_background_fails(cfg, recs):
    # A model that draws its median background and nothing else: same MSE as the background-only
    # baseline and no object at all, so it beats nothing and the verdict says so.
    model = still_model(cfg, recs)
    res = evaluate(model, cfg, recs[0], 0, K, 30, device="cpu")
    summary = res["summary"]
    assert set(summary) == {"model", *BASELINES}
    assert summary["model"]["mean_mse"] == pytest.approx(summary["background_only"]["mean_mse"], rel=1e-4)
    assert summary["model"]["object_horizon_frames"] == 0
    assert summary["background_only"]["object_horizon_frames"] == 0
    v = verdict({"all": summary})
    assert v["level"] == "failed" and not v["ok"] and v["beats"]["all"] == []
    assert "does not beat" in v["text"] and "not measurements" in v["text"]
    assert "What to try: train again with another seed" in v["text"]  # the issue: say what to try
    # the position rule: without an object, even a zero MSE beats nothing
    assert not beats({**summary["model"], "mean_mse": 0.0}, summary["persistence"])
    # the truth itself as the forecast: zero error, the object exactly on, every baseline beaten
    present = res["present"]
    _, exact = score_prediction(res["truth"], res["truth"], present, res["times"], res["origin"], cfg,
                                model.background.numpy())
    assert exact["object_horizon_frames"] == 30
    good = verdict({"all": {**summary, "model": exact}})
    assert good["level"] == "good" and good["ok"]
    assert sorted(good["beats"]["all"]) == sorted(BASELINES)
    assert "beats every simple baseline" in good["text"] and "not measurements" in good["text"]
    assert "What to try" not in good["text"]


def test_weak_when_persistence_wins_the_first_frames():
    # A disc in slow uniform motion (0.3 px per frame, closed form) forecast as the truth at half its
    # contrast: its object is exactly on (position error ~0) and its MSE is 1/4 of the bare
    # background's (contrast c/2 over the disc area), so it beats background_only. Over the first
    # forecast frame persistence is only 0.3 px off: the symmetric difference of two discs offset by
    # d is about 4 r d (geometry), so persistence's MSE there is about 16 d / (pi r) = 0.41 of the
    # model's. The model does not beat persistence early: weak.
    cfg = C.Config()
    times = np.arange(20) * 0.05
    frames = render_disc(np.c_[20.0 + 0.3 * np.arange(20), np.full(20, 30.0)], radius=3.7)
    truth, t, origin = frames[K:], times[K:], times[K - 1]
    dim = BG + 0.5 * (truth - BG)
    preds = {name: fn(frames[:K], len(t), times, background=BG) for name, fn in BASELINES.items()}
    preds["model"] = dim

    def scores(n):
        present = np.ones(n, bool)
        return {name: score_prediction(p[:n], truth[:n], present, t[:n], origin, cfg, BG)[1]
                for name, p in preds.items()}

    v = verdict({"first": scores(1), "all": scores(len(t))})
    assert v["level"] == "weak" and not v["ok"]
    assert "background_only" in v["beats"]["all"] and "persistence" not in v["beats"]["first"]
    assert "but not persistence" in v["text"] and "not measurements" in v["text"]
    assert "What to try: a longer run" in v["text"]


def test_judge_recordings_on_a_still_model(cfg, recs):
    # The trainer's entry point: two rendered trials, window 5 -> spans of 5 and 15 frames.
    out = judge_recordings(still_model(cfg, recs), cfg, recs, window=5)
    assert out["level"] == "failed" and "does not beat" in out["text"]
    assert list(out["summaries"]) == ["1W", "3W"] and out["recordings"] == 2
    for label in ("1W", "3W"):
        assert set(out["summaries"][label]) == {"model", *BASELINES}
        assert out["summaries"][label]["model"]["object_horizon_frames"] == 0
    # the 3W summary is the full 15-frame forecast that evaluate scores, averaged over the trials
    full = [evaluate(still_model(cfg, recs), cfg, r, 0, K, 15)["summary"]["persistence"]["mean_mse"]
            for r in recs]
    assert out["summaries"]["3W"]["persistence"]["mean_mse"] == pytest.approx(np.mean(full), rel=1e-9)


def test_a_good_verdict_says_when_a_baseline_stays_on_the_object_longer():
    # Object horizons in frames (the definition in README "What the metrics mean"): a model that is
    # closer on average but leaves the tolerance after 1 frame, against persistence staying within it
    # for 5, must say so; with the model's horizon the longest, nothing is added.
    from kinecast.score.verdict import _longer_horizon

    methods = {"model": {"object_horizon_frames": 1}, "persistence": {"object_horizon_frames": 5},
               "flow_warp": {"object_horizon_frames": 3}, "background_only": {"object_horizon_frames": 0}}
    text = _longer_horizon(methods, 1)
    assert "persistence" in text and "(5 frames)" in text and "leaves the tolerance sooner" in text
    assert _longer_horizon(methods, 5) == "" and _longer_horizon(methods, 9) == ""
