"""Plots: PCA against outside references, and figures that are written, readable and complete.

Outside references used here:
- PCA: the principal components are the eigenvectors of the sample covariance, ordered by
  eigenvalue, and the explained share is eigenvalue / trace (Jolliffe, *Principal Component
  Analysis*, 2nd ed., 2002; from memory). Reference implementation: ``numpy.linalg.eigh`` of
  ``numpy.cov``.
- Closed form: for points (a·cos θ, b·sin θ) at N >= 3 evenly spaced angles over a full turn,
  mean(cos²) = mean(sin²) = 1/2 and mean(cos·sin) = 0 (discrete orthogonality of the Fourier basis),
  so the variances along the ellipse axes are a²/2 and b²/2 and PC1 explains a² / (a² + b²).
- PNG (ISO/IEC 15948) read back with imageio; matplotlib's Agg writer stores RGBA (4 channels).
"""

from __future__ import annotations

import imageio.v3 as iio
import numpy as np
import pytest

from kinecast import plots as P
from kinecast.errors import KinecastError


def test_principal_components_match_eigh_of_the_covariance():
    rng = np.random.default_rng(0)
    mix = rng.normal(size=(6, 6)) * np.array([3.0, 2.0, 1.0, 0.5, 0.2, 0.1])[:, None]
    x = rng.normal(size=(300, 6)) @ mix + rng.normal(size=6)
    pca = P.principal_components(x, k=3)

    evals, evecs = np.linalg.eigh(np.cov(x, rowvar=False))  # ascending
    evals, evecs = evals[::-1], evecs[:, ::-1]
    np.testing.assert_allclose(pca.explained, evals[:3] / evals.sum(), rtol=1e-10)
    for i in range(3):
        assert abs(pca.components[i] @ evecs[:, i]) == pytest.approx(1.0, abs=1e-9)  # same axis, either sign
        sign = np.sign(pca.components[i] @ evecs[:, i])
        np.testing.assert_allclose(pca.scores[:, i], sign * (x - x.mean(0)) @ evecs[:, i], atol=1e-9)
    np.testing.assert_allclose(pca.mean, x.mean(0))


def test_principal_components_of_an_ellipse_closed_form():
    a, b, phi, n = 3.0, 1.0, 0.6, 64
    th = 2 * np.pi * np.arange(n) / n
    rot = np.array([[np.cos(phi), -np.sin(phi)], [np.sin(phi), np.cos(phi)]])
    pts = np.zeros((n, 4))
    pts[:, :2] = np.c_[a * np.cos(th), b * np.sin(th)] @ rot.T + [5.0, -2.0]
    pca = P.principal_components(pts)
    assert pca.explained[0] == pytest.approx(a**2 / (a**2 + b**2), rel=1e-12)
    assert pca.explained[1] == pytest.approx(b**2 / (a**2 + b**2), rel=1e-12)
    assert abs(pca.components[0] @ [np.cos(phi), np.sin(phi), 0, 0]) == pytest.approx(1.0, abs=1e-12)
    assert pca.components[0][np.abs(pca.components[0]).argmax()] > 0  # documented sign convention


def test_principal_components_edge_cases():
    assert P.principal_components(np.ones((5, 3))).explained.tolist() == [0.0, 0.0]
    assert P.principal_components(np.arange(6.0)[:, None], k=2).scores.shape == (6, 1)
    with pytest.raises(ValueError):
        P.principal_components(np.zeros((1, 3)))


def read_png(path):
    img = iio.imread(path)
    assert path.stat().st_size > 0
    assert img.ndim == 3 and img.shape[2] == 4  # matplotlib's Agg PNG is RGBA
    assert img[..., :3].std() > 0  # something is drawn
    return img


def test_phase_portrait_labels_give_explained_variance(tmp_path):
    th = np.linspace(0, 4 * np.pi, 120)
    lat = np.c_[2 * np.cos(th), np.sin(th), np.zeros_like(th)]
    fig = P.phase_portrait_figure(lat, th)
    ax = fig.axes[0]
    share = P.principal_components(lat).explained
    assert f"{100 * share[0]:.1f}%" in ax.get_xlabel() and f"{100 * share[1]:.1f}%" in ax.get_ylabel()
    read_png(P.phase_portrait(lat, th, tmp_path / "phase.png"))
    one_d = P.phase_portrait_figure(np.cos(th)[:, None], th)  # 1-D latent: drawn against time
    assert one_d.axes[0].get_xlabel() == "time (s)"
    with pytest.raises(KinecastError, match="NaN"):
        P.phase_portrait_figure(np.full((4, 2), np.nan), np.arange(4.0))


def write_log(path, rows, header="step,time_s,loss,nll,kl_w,lr,beta,val_mse"):
    path.write_text(header + "\n" + "\n".join(rows) + "\n")
    return path


def test_loss_curve_from_csv_subset_and_scales(tmp_path):
    rows = [f"{s},{0.1 * s:.1f},{2 + np.exp(-s / 10):.4f},{-50 + s:.1f},{5 / (1 + s):.4f},0.003,"
            f"{min(1, s / 10):.2f},{'0.01' if s % 10 == 0 else ''}" for s in range(40)]
    log = write_log(tmp_path / "train_log.csv", rows)
    fig = P.loss_curve_figure(log)
    titles = [ax.get_title() for ax in fig.axes]
    assert titles == ["training objective", "KL divergences and agreement", "frame error", "learning rate",
                      "KL weight"]
    scales = dict(zip(titles, (ax.get_yscale() for ax in fig.axes)))
    assert scales["training objective"] == "linear"  # nll is negative here: no log scale
    assert scales["KL divergences and agreement"] == "log"  # kl_w spans 5 to 0.125: over a decade
    assert scales["KL weight"] == "linear"  # beta starts at 0
    assert scales["learning rate"] == "linear"  # constant: less than a decade
    val = fig.axes[2].get_lines()[0]
    assert len(val.get_xdata()) == 4  # validation rows only (steps 0, 10, 20, 30)
    read_png(P.loss_curve(log, tmp_path / "loss.png"))
    read_png(P.loss_curve({"loss": [3.0, 2.0, 1.5]}, tmp_path / "loss_dict.png"))  # no step column


def test_loss_curve_from_row_records():
    rows = [{"step": s, "loss": 1.0 / s, "lr": 1e-3} for s in range(1, 31)]
    rows += [{"step": s, "val_mse": 0.1 / s, "window": 8} for s in (10, 20, 30)]  # sparse rows
    fig = P.loss_curve_figure(rows)
    titles = [ax.get_title() for ax in fig.axes]
    assert titles == ["training objective", "frame error", "learning rate", "training window"]
    np.testing.assert_array_equal(fig.axes[1].get_lines()[0].get_xdata(), [10, 20, 30])
    with pytest.raises(KinecastError, match="non-number"):
        P.loss_curve_figure([{"step": 1, "loss": "high"}])


def test_loss_curve_bad_logs_name_file_and_problem(tmp_path):
    with pytest.raises(KinecastError, match="not found"):
        P.loss_curve(tmp_path / "missing.csv", tmp_path / "a.png")
    bad = write_log(tmp_path / "bad.csv", ["0,0,1,1,1,0.1,0,", "1,0.1,oops,1,1,0.1,0,"])
    with pytest.raises(KinecastError) as err:
        P.loss_curve(bad, tmp_path / "a.png")
    assert str(bad) in str(err.value) and "line 3" in str(err.value) and "'loss'" in str(err.value)
    other = write_log(tmp_path / "other.csv", ["1,2"], header="alpha,gamma")
    with pytest.raises(KinecastError, match="no plottable columns"):
        P.loss_curve(other, tmp_path / "a.png")
    assert not (tmp_path / "a.png").exists()


def test_metric_curves_panels_lines_and_threshold(tmp_path):
    t = np.arange(1, 21) / 10.0
    per_method = {
        "model": {"mse": t / 10, "psnr": np.r_[np.inf, 30 - t[1:]], "ssim": 1 - t / 4, "position_error_px": t * 2},
        "persistence": {"mse": t / 5, "ssim": 1 - t / 2},
    }
    fig = P.metric_curves_figure(per_method, t, threshold=0.8)
    labels = [ax.get_ylabel() for ax in fig.axes if ax.get_visible()]
    assert labels == [P.METRIC_LABELS[m] for m in ("mse", "psnr", "ssim", "position_error_px")]
    assert "(dB)" in labels[1] and "(model px)" in labels[3]
    ssim_ax = fig.axes[2]
    dashed = [ln for ln in ssim_ax.get_lines() if ln.get_linestyle() == "--"]
    assert len(dashed) == 1 and set(dashed[0].get_ydata()) == {0.8}
    assert len(ssim_ax.get_lines()) == 3  # two methods + the threshold
    assert len(fig.axes[0].get_lines()) == 2 and len(fig.axes[1].get_lines()) == 1
    assert np.isnan(fig.axes[1].get_lines()[0].get_ydata()[0])  # infinite PSNR leaves a gap
    read_png(P.metric_curves(per_method, t, tmp_path / "metrics.png", threshold=0.8))
    with pytest.raises(ValueError):
        P.metric_curves_figure({"m": {"mse": t[:5]}}, t)


def test_truth_vs_prediction_rows(tmp_path):
    rng = np.random.default_rng(1)
    truth = rng.random((20, 1, 8, 8)).astype(np.float32)
    pred = np.clip(truth + 0.1, 0, 1)
    times = np.arange(20) / 25.0
    fig = P.truth_vs_prediction_figure(truth, pred, times, every=5)
    assert len(fig.axes) == 3 * 4  # truth, prediction, error rows × frames 0, 5, 10, 15
    assert fig.axes[1].get_title() == "t = 0.20 s"
    assert len(P.truth_vs_prediction_figure(None, pred, times, every=5).axes) == 4
    read_png(P.truth_vs_prediction(truth, pred, times, tmp_path / "rows.png", every=5))
    with pytest.raises(KinecastError, match="too many"):
        P.truth_vs_prediction(truth, pred, times, tmp_path / "wide.png", every=1)


def test_plots_refuse_to_overwrite_and_unknown_suffix(tmp_path):
    target = tmp_path / "loss.png"
    target.write_bytes(b"mine")
    with pytest.raises(KinecastError, match="already exists"):
        P.loss_curve({"loss": [1.0, 0.5]}, target)
    assert target.read_bytes() == b"mine"
    with pytest.raises(KinecastError, match="unknown plot extension '.bmp'"):
        P.loss_curve({"loss": [1.0, 0.5]}, tmp_path / "loss.bmp")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["loss.png"]
    read_png(P.loss_curve({"loss": [1.0, 0.5]}, target, overwrite=True))
    assert P.loss_curve({"loss": [1.0, 0.5]}, tmp_path / "loss.svg").read_text().lstrip().startswith("<?xml")


# --- readable at a glance: words instead of log keys, units on every axis, plain ticks -------------
# (the checks read the labels back from the matplotlib Figure; "no offset or ×10ⁿ tick notation" and
# "legend outside the data" are common practice for figures read by non-specialists)

RAW_KEYS = {c for _, _, names in P.LOG_PANELS for c in names}


def test_loss_plot_speaks_plain_language_with_units_and_plain_ticks():
    steps = np.arange(60)
    rows = [{"step": s, "loss": 0.5225 + 4e-4 * np.exp(-s / 20), "nll": 0.52 + 3e-4 * np.exp(-s / 20),
             "kl_s0": 0.01 * np.exp(-s / 10) + 1e-4, "kl_v0": 0.02, "kl_w": 0.003, "agreement": 0.001,
             "mse": 0.01 * np.exp(-s / 30), "lr": 3e-3, "beta": min(1.0, s / 30), "window": 8 + s // 10}
            for s in steps]
    fig = P.loss_curve_figure(rows)
    fig.canvas.draw()
    shown = [t.get_text() for ax in fig.axes for t in ax.get_legend().get_texts()]
    assert not RAW_KEYS & set(shown), shown  # kl_s0, nll, beta, ... never reach the reader
    for words in ("frame fit (negative log-likelihood per pixel)", "start-position KL", "start-velocity KL",
                  "field-weight KL", "KL weight"):
        assert words in shown, words
    for ax in fig.axes:
        assert ax.get_ylabel() and ax.get_xlabel() == "training step"
        assert ax.yaxis.get_offset_text().get_text() == ""  # the objective spans 0.5200-0.5229: no offset
        labels = [t.get_text() for t in ax.get_yticklabels() + ax.get_xticklabels()]
        assert not [x for x in labels if "10^" in x or "×" in x or "e-" in x or "$" in x], labels
    legend, axes_box = fig.axes[0].get_legend(), fig.axes[0].get_window_extent()
    assert not legend.get_window_extent().overlaps(axes_box)  # the legend sits below, off the curves


def test_metric_plot_horizon_from_zero_units_and_legend_off_the_curves():
    dt = 0.05
    times = 2.0 + dt * np.arange(1, 21)  # the recording's clock; the last given frame is at 2.0 s
    per_method = {"model": {"mse": times / 100, "position_error_px": times, "object_ssim": 1 - times / 10},
                  "persistence": {"mse": times / 50, "position_error_px": 2 * times,
                                  "object_ssim": 1 - times / 5}}
    fig = P.metric_curves_figure(per_method, times, threshold=0.8)
    fig.canvas.draw()
    for ax in fig.axes:
        assert ax.get_xlim()[0] == 0.0 and ax.get_xlabel() == "forecast horizon (s)"
        np.testing.assert_allclose(ax.get_lines()[0].get_xdata(), times - 2.0, atol=1e-12)
        assert ax.get_legend() is None
    assert "(model px)" in fig.axes[2].get_ylabel() and "squared" in fig.axes[0].get_ylabel()
    (legend,) = fig.legends
    texts = [t.get_text() for t in legend.get_texts()]
    assert "last frame held (baseline)" in texts and "persistence" not in texts
    assert any(ln.get_linestyle() == "--" for ln in fig.axes[1].get_lines())  # threshold on object SSIM
    for ax in fig.axes:
        assert not legend.get_window_extent().overlaps(ax.get_window_extent())
    # a known origin (the last context frame) is used as given
    fig = P.metric_curves_figure(per_method, times, origin=1.9)
    np.testing.assert_allclose(fig.axes[0].get_lines()[0].get_xdata(), times - 1.9, atol=1e-12)


def test_contact_rows_colour_bars_have_units_and_spread_scale_fits_the_data():
    rng = np.random.default_rng(2)
    truth = rng.random((12, 3, 8, 8)).astype(np.float32)
    pred = np.clip(truth + 0.05, 0, 1)
    spread = (0.04 * rng.random((12, 3, 8, 8))).astype(np.float32)  # far below the old fixed 0.5
    fig = P.truth_vs_prediction_figure(truth, pred, np.arange(12) / 10.0, every=4, spread=spread)
    n = 3  # frames 0, 4, 8
    error_row = [fig.axes[2 * n + c].images[0] for c in range(n)]
    spread_row = [fig.axes[3 * n + c].images[0] for c in range(n)]
    shown = spread[[0, 4, 8]].mean(axis=1)  # the tiles show the channel mean
    for img in spread_row:  # one scale for the whole row, topped by the largest spread shown
        assert img.get_clim() == (0.0, pytest.approx(float(shown.max()), rel=1e-6))
    assert all(img.get_clim() == (0.0, 1.0) for img in error_row)  # the error keeps the fixed 0-1 scale
    for row in (error_row, spread_row):  # one colour bar per row, beside its last frame, with its unit
        assert "intensity" in row[-1].colorbar.ax.get_ylabel()
    assert P.spread_scale(np.zeros((1, 1, 2, 2))) == P.MIN_SPREAD_SCALE  # one sample: no spread


def test_metric_curves_show_band_coverage_against_its_nominal_share():
    # Where samples were drawn the coverage of their band gets its own panel with the nominal share
    # (score.band) dotted: a calibrated band holds the truth that share of the time (definition of a
    # central prediction interval). "band_coverage" is the key the score writer passes (see
    # test_plotted_metric_keys_are_the_ones_scoring_produces).
    t = np.arange(1, 11) / 10.0
    per_method = {"model": {"mse": t / 10, "band_coverage": np.linspace(0.9, 0.4, 10)},
                  "persistence": {"mse": t / 5}}
    fig = P.metric_curves_figure(per_method, t, band=0.9)
    cov_ax = [ax for ax in fig.axes if ax.get_visible()][1]
    assert cov_ax.get_ylabel() == P.METRIC_LABELS["band_coverage"]
    dotted = [ln for ln in cov_ax.get_lines() if ln.get_linestyle() == ":"]
    assert len(dotted) == 1 and set(dotted[0].get_ydata()) == {0.9}


def test_plotted_metric_keys_are_the_ones_scoring_produces(tmp_path, monkeypatch):
    # The keys the plots read (METRIC_ORDER, METRIC_LABELS) checked against what kinecast.score
    # actually hands them: a real `evaluate` of an (untrained) model on rendered pendulum frames with
    # sampled futures, passed through the score verb's own writer. A key on either side that the other
    # lacks is a panel that silently never appears, or one labelled with a raw key. (Producer/consumer
    # agreement inside the project: there is no outside reference for key names.)
    import csv

    import torch

    from kinecast.config import Config
    from kinecast.frames import Recording
    from kinecast.model import build_model
    from kinecast.rigs import render_trials
    from kinecast.score.cli import write_scores
    from kinecast.score.evaluate import COUNT_KEYS, TRACK_KEYS, evaluate

    cfg = Config()
    cfg.data.size = 16
    cfg.model.enc_channels = cfg.model.dec_channels = 8
    cfg.model.hidden = 16
    fps = 20.0
    cfg.solver.time_scale = cfg.solver.units_per_frame * fps
    raw = render_trials("pendulum", trials=1, frames=14, seed=0, size=16, channels="grey")[0].frames
    rec = Recording(raw.transpose(0, 3, 1, 2) / 255.0, np.arange(14) / fps, np.zeros(14, bool), "pendulum")
    torch.manual_seed(0)
    result = evaluate(build_model(cfg, 1).eval(), cfg, rec, 0, 4, 10, samples=3)

    seen = {}

    def capture(per_method, times, path, **kw):
        seen.update(per_method)
        return real(per_method, times, path, **kw)

    real = P.metric_curves
    monkeypatch.setattr(P, "metric_curves", capture)
    write_scores(tmp_path, result, cfg, {})
    read_png(tmp_path / "metrics.png")

    scored = {m for per in result["per_frame"].values() for m in per} - set(COUNT_KEYS) - set(TRACK_KEYS)
    plotted = {m for per in seen.values() for m in per}
    assert set(seen) == set(result["per_frame"])  # every scored method reaches the plot
    assert plotted - scored == {"band_coverage"}  # the one key the writer adds: the sampled band
    np.testing.assert_array_equal(seen["model"]["band_coverage"], result["coverage"])
    assert set(P.METRIC_ORDER) == plotted, "plots read keys that scoring never produces, or miss some"
    assert all(m in P.METRIC_LABELS for m in plotted)
    # the per-frame table (RFC 4180 CSV, read back with the csv module) carries the same metrics
    with open(tmp_path / "per_frame.csv", newline="") as fh:
        header = next(csv.reader(fh))
    tracks = {f"{n}_model_px" for n in ("object_x", "object_y", "true_x", "true_y")}  # no source size given
    assert header[:3] == ["method", "frame", "time_s"] and set(header[3:]) == scored | tracks
