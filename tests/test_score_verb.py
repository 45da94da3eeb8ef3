"""The score and report verbs: every method scored on the same frames, files a person can open.

Outside references: SSIM/PSNR values are cross-checked against scikit-image
(skimage.metrics.structural_similarity / peak_signal_noise_ratio, Wang et al. 2004); the per-frame
CSV is RFC 4180; JSON is RFC 8259; the report is one HTML file whose media are RFC 2397 data URIs.
"""

import csv
import json
import re

import imageio.v3 as iio
import numpy as np
import pytest
from skimage.metrics import peak_signal_noise_ratio, structural_similarity

from kinecast import config as C
from kinecast.cli import main
from kinecast.frames import read_recording
from kinecast.plots import method_label
from kinecast.rigs import write_rig

METHODS = {"model", "background_only", "persistence", "constant_velocity", "flow_warp"}


@pytest.fixture(scope="module")
def setup(small_pendulum_run):
    return small_pendulum_run  # conftest.py: a rig and a 6-step fit on it


def test_score_writes_every_method_and_matches_skimage(setup, tmp_path, capsys):
    out = tmp_path / "scores"
    rec_path = setup / "rig" / "trial_001"
    assert main(["score", str(setup / "run"), str(rec_path), "--holdout", "last:30", "--context", "4",
                 "--samples", "3", "--out", str(out)]) == 0
    for name in ("per_frame.csv", "summary.json", "metrics.png", "forecast.mp4", "forecast_sheet.png"):
        assert (out / name).is_file(), name
    summary = json.loads((out / "summary.json").read_text())
    assert set(summary["methods"]) == METHODS
    assert "not measurements" in summary["caution"] and len(summary["band_coverage_per_frame"]) == 30
    with open(out / "per_frame.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == len(METHODS) * 30
    # persistence repeats frame 9 (the last context frame) for slots 10..39: recompute with skimage
    rec = read_recording(rec_path, C.apply_overrides(C.Config(), ["data.size=32"]).data)
    last = rec.frames[9, 0]
    for row in [r for r in rows if r["method"] == "persistence"][::7]:
        truth = rec.frames[10 + int(row["frame"]), 0]
        ref_ssim = structural_similarity(last, truth, data_range=1.0)
        assert float(row["ssim"]) == pytest.approx(ref_ssim, abs=1e-4)
        if np.any(last != truth):
            ref_psnr = peak_signal_noise_ratio(truth, last, data_range=1.0)
            assert float(row["psnr"]) == pytest.approx(ref_psnr, abs=1e-3)
    # the valid horizon ends at the first frame whose object-region SSIM is below 0.8 (frames where
    # no pixel differs from the background, NaN, are not judged)
    horizon = summary["methods"]["persistence"]["valid_horizon_frames"]
    ssim_p = [float(r["object_ssim"]) for r in rows if r["method"] == "persistence"]
    below = [i for i, s in enumerate(ssim_p) if s < 0.8]
    assert horizon == (below[0] if below else 30)
    assert summary["verdict"]["level"] in ("good", "weak", "failed")
    assert "not measurements" in summary["verdict"]["text"]
    printed = capsys.readouterr().out
    assert printed.index(summary["verdict"]["text"]) < printed.index("| method")  # verdict first
    # with samples: the coverage sentence, and the share of frames it reports is the per-frame list's
    assert "central 90 % region" in printed
    per = [c for c in summary["position_coverage_per_frame"] if c is not None]
    model = summary["methods"]["model"]
    if per:
        assert model["mean_position_coverage"] == pytest.approx(np.mean(per))
    assert 0.0 <= model["mean_band_coverage"] <= 1.0
    # units: the recording's own pixels per model pixel (a square picture shrunk to 32 px frames)
    width = iio.imread(sorted(rec_path.glob("*.png"))[0]).shape[1]
    assert summary["recording_px_per_model_px"] == pytest.approx(width / 32)
    err = model["mean_position_error_px"]  # null in summary.json where the model drew no object
    assert ("pixels of the recording" in printed) == (err is not None and bool(np.isfinite(err)))


def test_pair_mode_scores_two_frame_sources(setup, tmp_path):
    a, b = setup / "rig" / "trial_000", setup / "rig" / "trial_001"
    assert main(["score", "--pred", str(a), "--truth", str(a), "--out", str(tmp_path / "same")]) == 0
    same = json.loads((tmp_path / "same" / "summary.json").read_text())["methods"]["prediction"]
    assert same["mean_mse"] == 0.0 and same["mean_ssim"] == pytest.approx(1.0)
    assert main(["score", "--pred", str(a), "--truth", str(b), "--out", str(tmp_path / "diff")]) == 0
    diff = json.loads((tmp_path / "diff" / "summary.json").read_text())["methods"]["prediction"]
    assert diff["mean_mse"] > 0 and diff["mean_ssim"] < 1


def test_report_is_one_self_contained_page(setup, tmp_path):
    scores = tmp_path / "scores"
    assert main(["score", str(setup / "run"), str(setup / "rig" / "trial_001"), "--holdout", "last:20",
                 "--out", str(scores)]) == 0
    page_path = tmp_path / "report.html"
    assert main(["report", str(setup / "run"), "--scores", str(scores), "--out", str(page_path)]) == 0
    page = page_path.read_text()
    sources = re.findall(r'src="([^"]+)"', page)
    assert sources and all(s.startswith("data:") for s in sources)  # nothing fetched from elsewhere
    assert "video/mp4" in page and "image/png" in page
    assert "not measurements" in page and "safety-critical" in page
    assert "[model]" in page  # the config is shown
    for method in METHODS:  # methods in words ("last frame held (baseline)"), not summary.json keys
        assert f"<td>{method_label(method)}</td>" in page
    # section titles in words, numbers with units, raw keys only under "Technical details"
    assert "Scores: " not in page and "<h2>Forecast scores on trial_001</h2>" in page
    for unit in ("dB", "model px", "s"):
        assert re.search(rf"<td>[\d.]+ {unit}</td>", page), unit
    assert "the last 20 frames" in page and re.search(r"\(\d+(\.\d+)? s\)", page)  # horizons in s
    technical = page.index("<h2>Technical details</h2>")
    for raw in ("world_size", "replica_spread", "threads"):
        assert technical < page.index(f"<td>{raw}</td>"), raw
    assert "replica spread" not in page and "world size" not in page  # no half-translated keys
    # fit's spread line is on the page too, with its caution: this run held out one trial
    # (our own rule, kinecast.train.progress.FEW_CALIBRATION_TRIALS)
    saved = json.loads((setup / "run" / "summary.json").read_text())
    assert saved["spread_scale"] and saved["val_recordings"] == 1
    assert "<td>spread of the sampled futures</td>" in page and "the scale is rough" in page


def test_per_frame_tracks_are_in_the_recording_pixels(setup, tmp_path):
    # The same rig drawn at 64 px and read by a 32 px model (one model pixel = two recording pixels):
    # the truth's tracked centroid, mapped to the recording's pixels, must land on the centroid that
    # OpenCV's image moments (cv2.moments: m10/m00, m01/m00, pixel centres at integer coordinates)
    # give for the foreground of the full-size frame, |frame - median background|. The tracker
    # smooths and thresholds its weights, so the two agree to a fraction of a model pixel, not exactly.
    import cv2

    big = tmp_path / "big"
    write_rig("pendulum", big, trials=1, frames=40, seed=1, size=64, fps=20.0)
    out = tmp_path / "scores"
    assert main(["score", str(setup / "run"), str(big / "trial_000"), "--holdout", "last:30", "--context", "4",
                 "--out", str(out)]) == 0
    with open(out / "per_frame.csv", newline="") as fh:
        rows = [r for r in csv.DictReader(fh) if r["method"] == "persistence"]
    got = np.array([[float(r["true_x_rec_px"]), float(r["true_y_rec_px"])] for r in rows])
    full = read_recording(big / "trial_000", C.apply_overrides(C.Config(), ["data.size=64"]).data).frames[:, 0]
    weight = np.abs(full - np.median(full, axis=0))
    want = []
    for w in weight[10:40]:
        m = cv2.moments(w.astype(np.float32))
        want.append([m["m10"] / m["m00"], m["m01"] / m["m00"]])
    err = np.hypot(*(got - np.array(want)).T)
    assert np.median(err) < 1.0  # half a model pixel; model pixels for recording pixels would be ~6 off
