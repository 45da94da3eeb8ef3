"""Plots of training and scoring: loss terms, metric curves, latent phase portraits, frame rows.

Figures are drawn with matplotlib's Agg canvas (no screen, no pyplot state). Each ``*_figure``
function builds a :class:`matplotlib.figure.Figure`; the function of the same name without the suffix
writes it atomically (PNG, SVG or PDF by extension) and returns the path. An existing file is
refused unless ``overwrite`` is passed.

Every axis is labelled in words with its unit, ticks are plain numbers (no offset or ×10ⁿ notation),
and legends sit outside the curves.

Forecast scores describe statistical extrapolations, not measurements.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Mapping, NamedTuple, Sequence

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter, ScalarFormatter

from .errors import KinecastError
from .fileio import read_numeric_csv, write_with
from .render import MIN_SPREAD_SCALE, spread_scale, time_format

PLOT_SUFFIXES = (".png", ".svg", ".pdf")
DPI = 110
PANEL_INCHES = (4.2, 3.0)   # width, height of one panel
FRAME_INCHES = 1.2          # side of one frame in the quick-look rows
MAX_QUICK_COLUMNS = 16      # more frames than this in one row stop being a quick look
NOTE = "forecasts are statistical extrapolations, not measurements"
LEGEND_FONT = 7
LOG_SPAN = 10.0             # a panel goes on a log scale only when its values span a decade or more
FEW_DECADES = 1000.0        # below this span, log ticks at 1, 2 and 5 per decade; above, at 1 only
COLOUR_BAR_BOX = (1.08, 0.0, 0.08, 1.0)  # x, y, width, height of a colour bar, in its frame's units
INTENSITY = "intensity, 0 to 1"  # frames are intensities scaled to [0, 1] (frames/preprocess.py)
# training-log columns, grouped into panels (title, y-axis label, columns); 'step' (or 'time_s') is the
# x axis. The loss terms are per pixel of the frames and, for the likelihood and KL terms, in nats
# (natural-log units), as model/latent_ode.py and model/staged.py compute them.
LOG_PANELS = (
    ("training objective", "nats per pixel", ("loss", "nll")),
    ("KL divergences and agreement", "per pixel (KL in nats)", ("kl_s0", "kl_v0", "kl_w", "agreement")),
    ("frame error", f"mean squared error\n({INTENSITY}, squared)", ("mse", "val_mse")),
    ("learning rate", "learning rate (no unit)", ("lr",)),
    ("KL weight", "weight on the KL terms (no unit)", ("beta",)),
    ("training window", "window length (frames)", ("window",)),
)
# what a reader sees for each training-log column (the CSV keeps the short names)
TERM_LABELS = {
    "loss": "total loss (what training minimises)",
    "nll": "frame fit (negative log-likelihood per pixel)",
    "kl_s0": "start-position KL",
    "kl_v0": "start-velocity KL",
    "kl_w": "field-weight KL",
    "agreement": "encoder-trajectory agreement",
    "mse": "training frames",
    "val_mse": "validation frames",
    "lr": "learning rate",
    "beta": "KL weight",
    "window": "frames per training window",
}
# the per-frame metrics of kinecast.score.evaluate (MEAN_KEYS), in the order they are plotted, and the
# band coverage of sampled futures; tests/test_plots.py checks that every scored metric has a label
METRIC_ORDER = ("mse", "mae", "psnr", "ssim", "object_ssim", "position_error_px", "matched_error_px",
                "band_coverage")
METRIC_LABELS = {
    "mse": f"mean squared error\n({INTENSITY}, squared)",
    "mae": f"mean absolute error\n({INTENSITY})",
    "psnr": "peak signal-to-noise ratio (dB)",
    "ssim": "structural similarity, SSIM\n(no unit; 1 = identical)",
    "object_ssim": "SSIM around the objects\n(no unit; 1 = identical)",
    "position_error_px": "object position error\n(model px)",
    "matched_error_px": "matched-object position error\n(model px)",
    "band_coverage": "share of true pixels inside the\nsampled futures' band (no unit)",
}
# what a reader sees for each scoring method (summary.json and per_frame.csv keep the short names)
METHOD_LABELS = {
    "model": "model forecast",
    "prediction": "prediction",
    "background_only": "background only (baseline)",
    "persistence": "last frame held (baseline)",
    "constant_velocity": "constant velocity (baseline)",
    "flow_warp": "optical-flow warp (baseline)",
}


def term_label(column: str) -> str:
    """The words shown for a training-log column (unknown columns: underscores become spaces)."""
    return TERM_LABELS.get(column, column.replace("_", " "))


def method_label(method: str) -> str:
    """The words shown for a scoring method (another run keeps its folder name)."""
    return METHOD_LABELS.get(method, method)


def _plain_number(value: float, _pos=None) -> str:
    """A tick label as a plain decimal (0.0003, 0.5, 2000): no exponent, at most 4 significant digits."""
    return np.format_float_positional(value, precision=4, fractional=False, trim="-")


def _readable_ticks(ax) -> None:
    """Plain-number ticks on both axes: no offset, no scientific notation; log axes at 1-2-5 steps."""
    for axis, scale, limits in ((ax.xaxis, ax.get_xscale(), ax.get_xlim()),
                                (ax.yaxis, ax.get_yscale(), ax.get_ylim())):
        if scale == "log":
            span = max(limits) / min(limits)
            axis.set_major_locator(LogLocator(base=10.0, subs=(1.0, 2.0, 5.0) if span < FEW_DECADES else (1.0,)))
            axis.set_major_formatter(FuncFormatter(_plain_number))
            axis.set_minor_formatter(NullFormatter())
        else:
            fmt = ScalarFormatter(useOffset=False)
            fmt.set_scientific(False)
            axis.set_major_formatter(fmt)


class PCA(NamedTuple):
    """Principal components of a point cloud."""

    scores: np.ndarray      # (N, k) coordinates along the components
    components: np.ndarray  # (k, D) unit directions, largest variance first
    explained: np.ndarray   # (k,) share of the total variance along each component
    mean: np.ndarray        # (D,) the centre that was removed


def principal_components(latents: np.ndarray, k: int = 2) -> PCA:
    """The first ``k`` principal components by SVD of the centred data.

    Parameters
    ----------
    latents : ndarray, shape (N, D)
    k : int
        Components wanted; at most min(N, D) are returned.

    Returns
    -------
    PCA
        Signs are fixed so that the largest-magnitude loading of each component is positive. When
        all points coincide the explained shares are zero.

    References
    ----------
    I. T. Jolliffe, *Principal Component Analysis*, 2nd ed., Springer, 2002 (the components are the
    eigenvectors of the sample covariance, obtained here from the SVD of the centred data).
    """
    x = np.asarray(latents, dtype=np.float64)
    if x.ndim != 2 or len(x) < 2:
        raise ValueError(f"latents must be (N, D) with N >= 2, got shape {x.shape}")
    mean = x.mean(axis=0)
    _, s, vt = np.linalg.svd(x - mean, full_matrices=False)
    k = min(k, vt.shape[0])
    vt = vt[:k] * np.sign(vt[:k][np.arange(k), np.abs(vt[:k]).argmax(axis=1)])[:, None]
    total = float(np.sum(s**2))
    explained = s[:k] ** 2 / total if total > 0 else np.zeros(k)
    return PCA((x - mean) @ vt.T, vt, explained, mean)


def _new_figure(n_panels: int, columns: int = 3) -> tuple[Figure, list]:
    cols = min(columns, n_panels)
    rows = math.ceil(n_panels / cols)
    fig = Figure(figsize=(PANEL_INCHES[0] * cols, PANEL_INCHES[1] * rows), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(rows, cols, squeeze=False).ravel()
    for ax in axes[n_panels:]:
        ax.remove()
    return fig, list(axes[:n_panels])


def _check_out(out: str | Path, overwrite: bool) -> Path:
    path = Path(out)
    if path.suffix.lower() not in PLOT_SUFFIXES:
        raise KinecastError(path, f"unknown plot extension '{path.suffix}': allowed "
                                  f"{', '.join(PLOT_SUFFIXES)}")
    if path.is_dir():
        raise KinecastError(path, "is a folder, cannot write a plot in its place")
    if path.exists() and not overwrite:
        raise KinecastError(path, "already exists (pass --overwrite to replace it)")
    return path


def _save(fig: Figure, path: Path, overwrite: bool) -> Path:
    return write_with(path, lambda tmp: fig.savefig(tmp, format=path.suffix[1:].lower(), dpi=DPI),
                      overwrite)


def read_training_log(path: str | Path) -> dict[str, np.ndarray]:
    """Numeric columns of a training log CSV; empty cells become NaN."""
    header, rows = read_numeric_csv(path, "training log")
    return {name: np.array([math.nan if row[i] is None else row[i] for row in rows], dtype=np.float64)
            for i, name in enumerate(header)}


def _log_columns(log) -> tuple[str, dict[str, np.ndarray]]:
    """(name for messages, numeric columns) of a CSV path, a column mapping or a list of row dicts."""
    if isinstance(log, (str, Path)):
        return str(log), read_training_log(log)

    def num(v) -> float:
        try:
            return math.nan if v is None or v == "" else float(v)
        except (TypeError, ValueError):
            raise KinecastError("training log", f"non-number {v!r}") from None

    if isinstance(log, Mapping):
        return "training log", {k: np.array([num(x) for x in np.ravel(v)]) for k, v in log.items()}
    rows = list(log)
    keys = dict.fromkeys(k for r in rows for k in r)
    return "training log", {k: np.array([num(r.get(k)) for r in rows]) for k in keys}


def loss_curve_figure(log: str | Path | Mapping[str, np.ndarray] | Sequence[Mapping]) -> Figure:
    """Training terms and the validation score against step (see :func:`loss_curve`)."""
    source, cols = _log_columns(log)
    if not cols:
        raise KinecastError(source, "training log has no rows")
    if len({len(v) for v in cols.values()}) > 1:
        raise KinecastError(source, "columns have different lengths")
    panels = [(t, unit, [c for c in names if c in cols and np.isfinite(cols[c]).any()])
              for t, unit, names in LOG_PANELS]
    panels = [(t, unit, names) for t, unit, names in panels if names]
    if not panels:
        known = ", ".join(c for _, _, names in LOG_PANELS for c in names)
        raise KinecastError(source, f"no plottable columns: expected some of {known}")
    xname = "step" if "step" in cols else ("time_s" if "time_s" in cols else None)
    n = len(next(iter(cols.values())))
    x = cols[xname] if xname else np.arange(n, dtype=np.float64)
    fig, axes = _new_figure(len(panels))
    for ax, (title, unit, names) in zip(axes, panels):
        finite = np.concatenate([cols[c][np.isfinite(cols[c])] for c in names])
        for c in names:
            ok = np.isfinite(cols[c])
            sparse = ok.sum() < 0.5 * n  # e.g. validation rows only
            ax.plot(x[ok], cols[c][ok], marker="o" if sparse else None, ms=3, label=term_label(c))
        if finite.size and (finite > 0).all() and finite.max() >= LOG_SPAN * finite.min():
            ax.set_yscale("log")
        ax.set_title(title, fontsize=10)
        ax.set_xlabel({"step": "training step", "time_s": "training time (s)"}.get(xname, "log row"))
        ax.set_ylabel(unit, fontsize=8)
        _readable_ticks(ax)
        ax.legend(fontsize=LEGEND_FONT, loc="upper center", bbox_to_anchor=(0.5, -0.2), frameon=False)
        ax.grid(alpha=0.3)
    return fig


def loss_curve(log_csv_or_dict: str | Path | Mapping[str, np.ndarray] | Sequence[Mapping],
               out: str | Path, overwrite: bool = False) -> Path:
    """Plot the training log: each term against step, log scale where a panel is all positive.

    Parameters
    ----------
    log_csv_or_dict : path or mapping
        The training log CSV (any subset of step, time_s, loss, nll, kl_s0, kl_v0, kl_w, agreement,
        mse, lr, beta, window, val_mse; empty cells allowed), a mapping column -> values, or a list
        of row mappings (keys may differ between rows; a missing key is an empty cell).
    out : str or Path
        ``.png``, ``.svg`` or ``.pdf``.
    overwrite : bool
        Replace an existing file.

    Returns
    -------
    Path
    """
    path = _check_out(out, overwrite)
    return _save(loss_curve_figure(log_csv_or_dict), path, overwrite)


def forecast_horizon(times: np.ndarray, origin: float | None = None) -> np.ndarray:
    """Seconds since the last frame the forecast was given: ``times - origin``.

    Without ``origin`` the last given frame is taken to lie one median frame interval before the first
    scored frame (as ``kinecast score --pred/--truth`` assumes); a single time gives horizon 0.
    """
    times = np.asarray(times, dtype=np.float64)
    if origin is None:
        step = float(np.median(np.diff(times))) if len(times) > 1 else 0.0
        origin = float(times[0]) - step if len(times) else 0.0
    return times - origin


def _threshold_panel(metrics: list[str]) -> str:
    """The valid horizon is judged on the objects' SSIM when it is scored, else on the whole frame's."""
    return "object_ssim" if "object_ssim" in metrics else "ssim"


def metric_curves_figure(per_method: Mapping[str, Mapping[str, np.ndarray]], times: np.ndarray,
                         threshold: float | None = None, origin: float | None = None,
                         band: float | None = None) -> Figure:
    """One panel per metric against the forecast horizon (see :func:`metric_curves`)."""
    times = np.asarray(times, dtype=np.float64)
    horizon = forecast_horizon(times, origin)
    present = {m for scores in per_method.values() for m in scores}
    metrics = [m for m in METRIC_ORDER if m in present] + sorted(present - set(METRIC_ORDER))
    if not metrics:
        raise ValueError("metric_curves needs at least one metric")
    fig, axes = _new_figure(len(metrics))
    legend: dict[str, object] = {}
    for ax, metric in zip(axes, metrics):
        for method, scores in per_method.items():
            if metric not in scores:
                continue
            y = np.asarray(scores[metric], dtype=np.float64)
            if y.shape != times.shape:
                raise ValueError(f"{method}/{metric}: {y.shape} values for {times.shape} times")
            colour = f"C{list(per_method).index(method) % 10}"  # one colour per method in every panel
            line, = ax.plot(horizon, np.where(np.isfinite(y), y, np.nan), color=colour,
                            label=method_label(method))  # PSNR of a perfect frame is inf: a gap
            legend.setdefault(line.get_label(), line)
        if metric == _threshold_panel(metrics) and threshold is not None:
            line = ax.axhline(threshold, ls="--", color="0.35", lw=1,
                              label=f"valid-horizon threshold (SSIM {threshold:g})")
            legend.setdefault(line.get_label(), line)
        if metric == "band_coverage" and band is not None:
            line = ax.axhline(band, ls=":", color="0.35", lw=1, label=f"nominal band ({band:.0%} of samples)")
            legend.setdefault(line.get_label(), line)
        ax.set_xlim(left=0.0)
        ax.set_xlabel("forecast horizon (s)")
        ax.set_ylabel(METRIC_LABELS.get(metric, metric.replace("_", " ")), fontsize=8)
        _readable_ticks(ax)
        ax.grid(alpha=0.3)
    fig.legend(list(legend.values()), list(legend), loc="outside lower center", fontsize=LEGEND_FONT,
               ncols=min(3, len(legend)), frameon=False)
    fig.suptitle(NOTE, fontsize=8, color="0.3")
    return fig


def metric_curves(per_method: Mapping[str, Mapping[str, np.ndarray]], times: np.ndarray,
                  out: str | Path, threshold: float | None = None, overwrite: bool = False,
                  origin: float | None = None, band: float | None = None) -> Path:
    """Plot per-frame scores against the forecast horizon: one panel per metric, one line per method.

    Parameters
    ----------
    per_method : mapping
        ``{method: {metric: (T,) array}}``; metrics like mse, mae, psnr, ssim, position_error_px, whichever
        are present. Non-finite values (the infinite PSNR of a perfect frame) leave gaps.
    times : ndarray, shape (T,)
        Time of each scored frame in seconds (the recording's clock).
    out : str or Path
        ``.png``, ``.svg`` or ``.pdf``.
    threshold : float, optional
        The SSIM level that ends the valid horizon, drawn dashed on the object-SSIM panel (or the SSIM
        panel when object SSIM is not scored).
    overwrite : bool
        Replace an existing file.
    origin : float, optional
        Time of the last frame the forecast was given; the x axis is ``times - origin``, from 0.
        Default: one median frame interval before the first scored frame (see
        :func:`forecast_horizon`).
    band : float, optional
        Nominal share of the sampled futures' band, drawn dotted on the ``band_coverage`` panel (a
        method's ``band_coverage``: share of true pixels inside the band, where samples were drawn).

    Returns
    -------
    Path
    """
    path = _check_out(out, overwrite)
    return _save(metric_curves_figure(per_method, times, threshold, origin, band), path, overwrite)


def phase_portrait_figure(latents: np.ndarray, times: np.ndarray) -> Figure:
    """The latent trajectory on its first two principal components (see :func:`phase_portrait`)."""
    latents, times = np.asarray(latents, dtype=np.float64), np.asarray(times, dtype=np.float64)
    if not np.isfinite(latents).all():
        raise KinecastError("latents", "contain NaN or infinite values (did the model diverge?)")
    if len(times) != len(latents):
        raise ValueError(f"{len(latents)} latent points but {len(times)} times")
    pca = principal_components(latents, k=2)
    fig, (ax,) = _new_figure(1)
    label = "PC{} ({:.1f}% of variance)"
    if pca.scores.shape[1] >= 2:
        x, y = pca.scores[:, 0], pca.scores[:, 1]
        ax.set_xlabel(label.format(1, 100 * pca.explained[0]))
        ax.set_ylabel(label.format(2, 100 * pca.explained[1]))
    else:  # a one-dimensional latent: show it against time
        x, y = times, pca.scores[:, 0]
        ax.set_xlabel("time (s)")
        ax.set_ylabel(label.format(1, 100 * pca.explained[0]))
    ax.plot(x, y, color="0.75", lw=0.8, zorder=1)
    dots = ax.scatter(x, y, c=times, cmap="viridis", s=12, zorder=2)
    fig.colorbar(dots, ax=ax, label="time (s)")
    ax.set_title("latent trajectory", fontsize=10)
    ax.grid(alpha=0.3)
    return fig


def phase_portrait(latents: np.ndarray, times: np.ndarray, out: str | Path,
                   overwrite: bool = False) -> Path:
    """Plot a latent trajectory ``(N, D)`` on its first two principal components, coloured by time.

    The axis labels give each component's share of the variance. A one-dimensional latent is drawn
    against time instead.

    Returns
    -------
    Path
    """
    path = _check_out(out, overwrite)
    return _save(phase_portrait_figure(latents, times), path, overwrite)


def keypoint_phase_figure(pixels: np.ndarray, times: np.ndarray) -> Figure:
    """Phase portrait of each keypoint in the recording's pixels (see :func:`keypoint_phase`)."""
    pixels, times = np.asarray(pixels, dtype=np.float64), np.asarray(times, dtype=np.float64)
    if pixels.ndim != 3 or pixels.shape[2] != 4 or len(pixels) != len(times):
        raise ValueError(f"pixels must be (N, K, 4) with N = len(times), got {pixels.shape}")
    if not np.isfinite(pixels).all():
        raise KinecastError("keypoints", "contain NaN or infinite values (did the model diverge?)")
    fig, (ax,) = _new_figure(1)
    for j in range(pixels.shape[1]):
        xy, v = pixels[:, j, :2], pixels[:, j, 2:]
        centred = xy - xy.mean(axis=0)
        direction = np.linalg.svd(centred, full_matrices=False)[2][0] if len(xy) > 1 else np.array([1.0, 0.0])
        pos, vel = centred @ direction, v @ direction
        ax.plot(pos, vel, color="0.75", lw=0.8, zorder=1)
        dots = ax.scatter(pos, vel, c=times, cmap="viridis", s=12, zorder=2,
                          marker="os^Dv<>p"[j % 8], label=f"keypoint {j}")
    fig.colorbar(dots, ax=ax, label="time (s)")
    ax.set_xlabel("position along its main direction of motion (px)")
    ax.set_ylabel("velocity along that direction (px/s)")
    ax.set_title("keypoint phase portrait", fontsize=10)
    ax.legend(fontsize=LEGEND_FONT, loc="upper center", bbox_to_anchor=(0.5, -0.2), frameon=False,
              ncols=min(4, pixels.shape[1]))
    ax.grid(alpha=0.3)
    return fig


def keypoint_phase(pixels: np.ndarray, times: np.ndarray, out: str | Path, overwrite: bool = False) -> Path:
    """Plot each keypoint's position against its velocity along its main direction of motion.

    ``pixels`` is (N, K, 4): ``x_px, y_px, vx_px_s, vy_px_s`` per time and keypoint, in the
    recording's own pixels (from :func:`kinecast.forecast.core.keypoint_pixels`).
    """
    path = _check_out(out, overwrite)
    return _save(keypoint_phase_figure(pixels, times), path, overwrite)


def _show(ax, frame: np.ndarray, cmap: str, vmax: float = 1.0):
    """An image (RGB as is, grey in 'gray') or, for any other map, the channel mean on [0, vmax]."""
    if frame.shape[0] == 3 and cmap == "gray":
        image = ax.imshow(np.clip(frame.transpose(1, 2, 0), 0, 1), interpolation="nearest")
    else:
        image = ax.imshow(frame.mean(axis=0), cmap=cmap, vmin=0.0, vmax=vmax, interpolation="nearest")
    ax.set_xticks([])
    ax.set_yticks([])
    return image


def truth_vs_prediction_figure(truth: np.ndarray | None, pred: np.ndarray, times: np.ndarray,
                               every: int, spread: np.ndarray | None = None) -> Figure:
    """Rows of frames (see :func:`truth_vs_prediction`)."""
    pred, times = np.asarray(pred, dtype=np.float32), np.asarray(times, dtype=np.float64)
    if pred.ndim != 4 or len(times) != len(pred):
        raise ValueError(f"pred must be (T, C, H, W) with T = len(times), got {pred.shape}")
    if truth is not None and np.shape(truth) != pred.shape:
        raise ValueError(f"truth {np.shape(truth)} and pred {pred.shape} differ in shape")
    if int(every) != every or every < 1:
        raise ValueError(f"every must be a whole number >= 1, got {every!r}")
    picks = np.arange(0, len(pred), int(every))
    if len(picks) > MAX_QUICK_COLUMNS:
        raise KinecastError(f"every={every}", f"{len(picks)} columns is too many for a quick look: use "
                                              f"every >= {math.ceil(len(pred) / MAX_QUICK_COLUMNS)}")
    if spread is not None and np.shape(spread) != pred.shape:
        raise ValueError(f"spread {np.shape(spread)} and pred {pred.shape} differ in shape")
    # (row name, frames, colour map, top of the colour scale, colour-bar label or None)
    rows = [("prediction", pred, "gray", 1.0, None)]
    if truth is not None:
        truth = np.asarray(truth, dtype=np.float32)
        rows = [("truth", truth, "gray", 1.0, None), rows[0],
                ("abs. error", np.abs(truth - pred), "magma", 1.0, f"|truth - prediction|\n({INTENSITY})")]
    if spread is not None:
        spread = np.asarray(spread, dtype=np.float32)
        rows.append(("spread", spread, "viridis", spread_scale(spread[picks]),
                     f"std. of sampled\nfutures ({INTENSITY})"))
    bars = any(unit for *_, unit in rows)  # room for the colour bars beside the last column
    fig = Figure(figsize=(FRAME_INCHES * (len(picks) + bars), FRAME_INCHES * len(rows) + 0.4),
                 layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(len(rows), len(picks), squeeze=False)
    fmt = time_format(times)
    for r, (name, frames, cmap, vmax, unit) in enumerate(rows):
        for c, i in enumerate(picks):
            image = _show(axes[r, c], frames[i], cmap, vmax)
            if r == 0:
                axes[r, c].set_title(fmt.format(times[i]), fontsize=8)
        axes[r, 0].set_ylabel(name, fontsize=8)
        if unit:
            # beside the row's last frame, so that every row keeps the same frame size and columns
            bar = fig.colorbar(image, cax=axes[r, -1].inset_axes(COLOUR_BAR_BOX))
            bar.set_label(unit, fontsize=6)
            bar.ax.tick_params(labelsize=6)
            bar.ax.yaxis.set_major_formatter(FuncFormatter(_plain_number))
    fig.suptitle(NOTE, fontsize=7, color="0.3")
    return fig


def truth_vs_prediction(truth: np.ndarray | None, pred: np.ndarray, times: np.ndarray,
                        out: str | Path, every: int, overwrite: bool = False,
                        spread: np.ndarray | None = None) -> Path:
    """Rows of every ``every``-th frame: truth, prediction, absolute error and spread, with colour bars.

    The absolute error is drawn on the fixed scale 0 to 1 ('magma'); the spread ('viridis') on 0 to the
    largest spread among the frames shown, so that a small spread is still visible.

    Parameters
    ----------
    truth : ndarray or None
        ``(T, C, H, W)`` in [0, 1]; None draws the prediction row only.
    pred : ndarray
        ``(T, C, H, W)`` in [0, 1].
    times : ndarray, shape (T,)
        Seconds, written above each column.
    out : str or Path
        ``.png``, ``.svg`` or ``.pdf``.
    every : int
        Column stride; at most 16 columns.
    overwrite : bool
        Replace an existing file.
    spread : ndarray, optional
        ``(T, C, H, W)`` per-pixel standard deviation of sampled futures; adds the spread row.

    Returns
    -------
    Path
    """
    path = _check_out(out, overwrite)
    return _save(truth_vs_prediction_figure(truth, pred, times, every, spread), path, overwrite)
