"""Shared pieces of the benchmark: run profiles, goals, timing, result rows and the output files.

Every figure that matters is a ratio of two numbers measured in the same run on the same machine
(achieved / peak FLOP/s, kinecast read / raw decode, model error / persistence error), because the
machines are shared and their absolute speed varies from minute to minute.
"""

from __future__ import annotations

import json
import math
import os
import platform
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import torch

from kinecast.fileio import write_text

ROOT = Path(__file__).resolve().parents[1]
RESULTS_DIR = ROOT / "bench" / "results"

# Goals, from the project's issue for `make bench`.
EFFICIENCY_GOAL = 0.35        # achieved training FLOP/s over the machine's measured peak
BF16_GAIN_GOAL = 1.5          # a default training step in bfloat16 over the same step in float32
ROLLOUT_GOAL_FPS = 4000.0     # rollout + decode frames/s with 10 samples at 64 px on 2 cores (issue 14)
RSS_GOAL_BYTES = 1.5e9        # peak RSS while training, 64 px (1.5 GB, decimal)
READ_RATIO_GOAL = 0.8         # kinecast read throughput over a raw ffmpeg decode of the same file
COVERAGE_SAMPLES = 16         # futures drawn per trial for the coverage figures (seeded: forecast.seed)
COVERAGE_KEYS = ("mean_position_coverage", "mean_object_band_coverage")
# Central share of the interval quoted beside a mean over trials (bootstrap over the trials)
INTERVAL_LEVEL = 0.90


def mean_interval(values, level: float = INTERVAL_LEVEL, seed: int = 0) -> tuple[float, float]:
    """Percentile-bootstrap ``level`` interval of the mean of per-trial ``values`` (trials resampled
    with replacement; non-finite entries left out; NaN, NaN when fewer than two remain).

    A mean over a dozen trials carries the trials' own spread: the coverage of one pendulum run
    ranged 0.4-1.0 from trial to trial, so a perfectly calibrated model's mean over 12 trials can
    land outside 0.85-0.95 by chance. The interval says how far.

    References
    ----------
    B. Efron and R. J. Tibshirani (1993). An Introduction to the Bootstrap, ch. 13 (percentile
    interval); computed with :func:`scipy.stats.bootstrap`.
    """
    from scipy.stats import bootstrap

    x = np.asarray(values, dtype=float)
    x = x[np.isfinite(x)]
    if len(x) < 2 or np.ptp(x) == 0:
        return (float(x[0]), float(x[0])) if len(x) >= 2 else (math.nan, math.nan)
    res = bootstrap((x,), np.mean, confidence_level=level, method="percentile", n_resamples=2000,
                    random_state=np.random.default_rng(seed))
    return float(res.confidence_interval.low), float(res.confidence_interval.high)


def trial_coverage(model, cfg, rec, n: int, device="cpu") -> dict[str, float]:
    """Position and object-pixel band coverage of :data:`COVERAGE_SAMPLES` sampled futures of ``rec``
    forecast for ``n`` frames from its first ``model.velocity_frames`` (nominal ``score.band``)."""
    from kinecast.score.evaluate import evaluate

    k = cfg.model.velocity_frames
    got = evaluate(model, cfg, rec, 0, k, n, samples=COVERAGE_SAMPLES, device=device,
                   baselines=False)["summary"]["model"]
    return {key: got.get(key, math.nan) for key in COVERAGE_KEYS}
BEAT_FACTOR = 10.0            # time-to-quality: model MSE at 3× window ≤ persistence MSE / 10
# Our reading of "flat in length" (the issue gives no number): a recording 10× longer may cost at
# most 20 % more peak RSS.
FLAT_RSS_RATIO = 1.2
NOMINAL_FPS = 30.0            # frame rate of every recording the bench renders (the rigs' default)


@dataclass(frozen=True)
class Profile:
    """Sizes and budgets of one benchmark run (``full``, ``quick`` or the toy ``smoke``)."""

    name: str
    repeats: int                          # timed repetitions; the best (shortest) one counts
    train_sizes: tuple[int, ...]          # training-step throughput at these frame sizes (px)
    efficiency_size: int                  # the size of the row labelled `efficiency`
    step_window: int                      # frames per window in the timed training step
    rollout_size: int
    rollout_frames: int                   # frames forecast per rollout
    rollout_samples: tuple[int, ...]
    memory_frames: tuple[int, ...]        # recording lengths for the peak-RSS runs
    memory_size: int
    memory_steps: int                     # training steps per peak-RSS run
    video_frames: int
    video_upscale: int                    # source video is the model size × this
    video_size: int                       # model size the video is read at
    rigs: tuple[str, ...]                 # forecast-quality rigs
    quality_size: int
    budget: str                           # wall-clock budget per learned method per rig
    window: int                           # training window W (train.window_max); horizons 1-3 × W
    train_trials: int
    train_frames: int
    eval_trials: int                      # held-out trials every method is scored on
    coverage_trials: int                  # held-out trials the sampled futures' coverage is judged on
    val_every: int                        # steps between validations (and checkpoints)
    gain_rounds: int                      # interleaved fp32 / bf16 rounds for the speed-up rows


PROFILES = {
    "full": Profile("full", repeats=5, train_sizes=(32, 64, 128), efficiency_size=64, step_window=20,
                    rollout_size=64, rollout_frames=100, rollout_samples=(1, 10),
                    memory_frames=(1000, 10000), memory_size=64, memory_steps=5,
                    video_frames=1000, video_upscale=4, video_size=64,
                    rigs=("pendulum", "spring", "airtable"), quality_size=64, budget="5m", window=20,
                    train_trials=12, train_frames=120, eval_trials=4, coverage_trials=32, val_every=25,
                    gain_rounds=8),
    "quick": Profile("quick", repeats=3, train_sizes=(32, 64), efficiency_size=64, step_window=20,
                     rollout_size=64, rollout_frames=100, rollout_samples=(1, 10),
                     memory_frames=(1000, 10000), memory_size=64, memory_steps=3,
                     video_frames=500, video_upscale=4, video_size=64,
                     rigs=("pendulum",), quality_size=32, budget="45s", window=20,
                     train_trials=8, train_frames=100, eval_trials=3, coverage_trials=6, val_every=15,
                     gain_rounds=4),
    # Toy sizes for development and the smoke test: the goals do not apply to these numbers.
    "smoke": Profile("smoke", repeats=2, train_sizes=(16,), efficiency_size=16, step_window=6,
                     rollout_size=16, rollout_frames=10, rollout_samples=(1, 2),
                     memory_frames=(60, 120), memory_size=16, memory_steps=2,
                     video_frames=30, video_upscale=4, video_size=16,
                     rigs=("pendulum",), quality_size=16, budget="4s", window=6,
                     train_trials=4, train_frames=30, eval_trials=2, coverage_trials=2, val_every=5,
                     gain_rounds=2),
}


@dataclass
class Row:
    """One line of the results table: a measured figure, its goal and whether the goal is met."""

    area: str
    measure: str
    value: str
    goal: str = "—"
    met: bool | None = None


def goal_row(area: str, measure: str, value: float | None, text: str, goal: float | None,
             goal_text: str, higher_is_better: bool = True) -> Row:
    """A row whose ``met`` compares ``value`` with ``goal`` (None when either is unknown)."""
    if value is None or goal is None or not math.isfinite(value):
        return Row(area, measure, text, goal_text, None)
    met = value >= goal if higher_is_better else value <= goal
    return Row(area, measure, text, goal_text, bool(met))


def markdown_table(rows: list[Row]) -> str:
    """The rows as one markdown table: area | measure | value | goal | met."""
    def cell(s: str) -> str:
        return str(s).replace("|", "/").replace("\n", " ")

    lines = ["| area | measure | value | goal | met |", "|---|---|---|---|---|"]
    for r in rows:
        met = "—" if r.met is None else ("yes" if r.met else "no")
        lines.append(f"| {cell(r.area)} | {cell(r.measure)} | {cell(r.value)} | {cell(r.goal)} | {met} |")
    return "\n".join(lines)


def fmt_si(x: float | None, unit: str = "", digits: int = 3) -> str:
    """``12.3 G`` style number with a unit; ``n/a`` for None or non-finite."""
    if x is None or not math.isfinite(x):
        return "n/a"
    for factor, prefix in ((1e12, "T"), (1e9, "G"), (1e6, "M"), (1e3, "k")):
        if abs(x) >= factor:
            return f"{x / factor:.{digits}g} {prefix}{unit}"
    return f"{x:.{digits}g} {unit}".rstrip()


def pick_device(pref: str) -> torch.device:
    """``auto`` → CUDA when present, else CPU (the trainer's own rule)."""
    from kinecast.train.distributed import pick_device as resolve

    return resolve(pref)


def sync(device: torch.device) -> None:
    """Wait for queued GPU work, so wall-clock timings are complete."""
    if device.type == "cuda":
        torch.cuda.synchronize(device)


def best_time(fn: Callable[[], object], repeats: int, device: torch.device, warmup: int = 1) -> float:
    """Shortest wall time of ``repeats`` calls of ``fn`` after ``warmup`` untimed calls.

    The shortest run is the one least disturbed by other work on a shared machine (common practice
    for micro-benchmarks).
    """
    for _ in range(warmup):
        fn()
    sync(device)
    best = math.inf
    for _ in range(max(1, repeats)):
        t0 = time.perf_counter()
        fn()
        sync(device)
        best = min(best, time.perf_counter() - t0)
    return best


def use_all_cores() -> int:
    """Set torch's intra-op threads to the core count and keep large freed blocks in the process
    where ``train.keep_heap`` is on by default (both as the trainer does by default)."""
    from kinecast.heap import keep_large_blocks

    n = os.cpu_count() or 1
    torch.set_num_threads(n)
    if _keep_heap():
        keep_large_blocks()
    return n


def _keep_heap() -> bool:
    from kinecast.config import Config

    return Config().train.keep_heap


# CPU flags that decide how fast bfloat16 runs (x86: AVX-512 BF16 instructions, AMX tiles)
BF16_FLAGS = ("avx512_bf16", "amx_bf16", "amx_tile")


def cpu_facts(cpuinfo: str | None = None) -> dict:
    """The CPU's model name and which of :data:`BF16_FLAGS` it has, from Linux's /proc/cpuinfo
    (``cpuinfo``: its text, read when None; {} where there is none). The workplace lends machines
    of more than one kind: the bf16 peak measured 792 GFLOP/s on one and 408 on another."""
    if cpuinfo is None:
        try:
            cpuinfo = Path("/proc/cpuinfo").read_text()
        except OSError:
            return {}
    first = cpuinfo.split("\n\n", 1)[0]  # the first processor's block: every core reports the same
    fields = dict(line.split(":", 1) for line in first.splitlines() if ":" in line)
    fields = {k.strip(): v.strip() for k, v in fields.items()}
    flags = set(fields.get("flags", "").split())
    return {"cpu_model": fields.get("model name", "?"), "bf16_flags": [f for f in BF16_FLAGS if f in flags]}


def machine_info(device: torch.device) -> dict:
    """Facts about where the numbers were measured."""
    info = {"platform": platform.platform(), "python": platform.python_version(),
            "torch": torch.__version__, "cpu_count": os.cpu_count(), "device": str(device),
            "torch_threads": torch.get_num_threads(), "keep_heap": _keep_heap(), **cpu_facts()}
    if device.type == "cuda":
        info["gpu"] = torch.cuda.get_device_name(device)
    return info


def load_average() -> list[float] | None:
    """The 1, 5 and 15 minute load averages (None where the platform has none)."""
    try:
        return [round(x, 2) for x in os.getloadavg()]
    except (AttributeError, OSError):
        return None


def _cpu_words(machine: dict) -> str:
    flags = machine.get("bf16_flags")
    if flags is None:
        return "CPU model not recorded"
    heap = {True: "; large freed blocks kept (train.keep_heap)", False: "; train.keep_heap off"}
    return f"{machine.get('cpu_model', '?')}, bf16 flags: {', '.join(flags) or 'none'}" + heap.get(
        machine.get("keep_heap"), "")


@dataclass
class Report:
    """Everything one run produced: the rows, the raw numbers and where they were measured."""

    profile: str
    meta: dict = field(default_factory=dict)
    rows: list[Row] = field(default_factory=list)
    raw: dict = field(default_factory=dict)

    def markdown(self) -> str:
        m = self.meta
        head = [f"# kinecast bench — profile `{self.profile}`", "",
                f"Measured {m.get('finished', '')} on {m.get('machine', {}).get('cpu_count')} cores "
                f"({m.get('machine', {}).get('device')}; {_cpu_words(m.get('machine', {}))}); "
                f"load average at start {m.get('load_start')}, "
                f"at end {m.get('load_end')}; run took {m.get('elapsed_s')} s.", ""]
        if self.profile == "smoke":
            head += ["Smoke profile: toy sizes to keep the scripts working; the goals do not apply.", ""]
        notes = ["", "Timings are the best of several repeats. Forecast scores are statistical "
                 "extrapolations on synthetic rigs rendered by kinecast itself, not measurements of a "
                 "real apparatus; kinecast is not for safety-critical control."]
        notes += [f"- {n}" for n in m.get("notes", [])]
        return "\n".join(head) + "\n" + markdown_table(self.rows) + "\n" + "\n".join(notes) + "\n"

    def write(self, folder: Path, stem: str) -> tuple[Path, Path]:
        """Write ``stem.md`` and ``stem.json`` atomically into ``folder``."""
        folder = Path(folder)
        md = write_text(folder / f"{stem}.md", self.markdown())
        data = {"profile": self.profile, "meta": self.meta, "rows": [asdict(r) for r in self.rows],
                "raw": self.raw}
        text = json.dumps(_finite(data), indent=2, default=_json_default, allow_nan=False)
        js = write_text(folder / f"{stem}.json", text + "\n")
        return md, js


def _finite(obj):
    """A copy with non-finite floats as None (JSON has no NaN or infinity)."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {str(k): _finite(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite(v) for v in obj]
    return obj


def _json_default(obj):
    if hasattr(obj, "tolist"):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"not JSON-serialisable: {type(obj).__name__}")
