"""Keep the benchmark scripts working: their cheapest pieces at toy size, checked against outside facts."""

import json
import math
import sys
import time
from pathlib import Path

import cv2
import numpy as np
import pytest
import torch
import torch.nn.functional as F

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bench import common, flops, rss, throughput, video_read  # noqa: E402
from bench.rows import train_rows  # noqa: E402
from kinecast.model import build_model, to_model_time  # noqa: E402

CPU = torch.device("cpu")


@pytest.fixture(autouse=True)
def _threads():
    old = torch.get_num_threads()
    yield
    torch.set_num_threads(old)


def test_flop_counter_matches_closed_forms():
    # A (n×m)·(m×p) product is n·p·m multiply-adds = 2·n·m·p FLOPs (closed form; counting a
    # multiply-add as 2 FLOPs is common practice). The peak and the training step use this counter,
    # so this pins the convention both sides of the efficiency ratio share.
    a, b = torch.randn(7, 5), torch.randn(5, 3)
    assert flops.count_flops(lambda: a @ b) == 2 * 7 * 5 * 3
    # A stride-1 "same" convolution: every output pixel of every output channel is Cin·k² multiply-adds
    # (closed form).
    x, w = torch.randn(2, 4, 9, 9), torch.randn(6, 4, 3, 3)
    assert flops.count_flops(lambda: F.conv2d(x, w, padding=1)) == 2 * 2 * 6 * 9 * 9 * 4 * 3 * 3


def forward_flops(size: int, window: int) -> int:
    """FLOPs of the training loss's forward pass alone, on the bench's own batch and model."""
    torch.manual_seed(throughput.SEED)
    cfg = throughput.model_config(size)
    frames = throughput.rig_frames(size, window + cfg.train.batch)
    x = torch.stack([frames[i:i + window] for i in range(cfg.train.batch)])
    t = to_model_time(np.arange(window) / common.NOMINAL_FPS, cfg)
    model = build_model(cfg, 1).train()
    return flops.count_flops(lambda: model(x, t, n_total_frames=len(frames), beta=1.0)["loss"])


def test_training_step_rate_is_consistent_and_below_peak():
    t0 = time.perf_counter()
    step = throughput.train_step_rate(16, 4, 1, CPU)
    wall = time.perf_counter() - t0
    # the peak of the format the step's convolutions ran in (bf16 where this CPU has it)
    dtype = torch.bfloat16 if step["precision"] == "bf16" else torch.float32
    peak = flops.peak_rate(CPU, repeats=1, matmul_n=1024, conv=(8, 64, 32), dtype=dtype)
    # The timed step is one of the steps the call runs, so it fits inside the call's wall time on the
    # standard library's clock (time.perf_counter); a unit slip (ms for s) would not.
    assert 0 < step["step_s"] < wall
    # Forward + backward: for every matrix product and convolution the backward pass makes one
    # product of the same size for the weight gradient and one for the input gradient, except where
    # the input needs no gradient (the first layer), so the count is 2-3x the forward pass's alone
    # (common practice: "backward ≈ 2x forward"; Kaplan et al. 2020, from memory).
    forward = forward_flops(16, 4)
    assert 2 * forward <= step["flops_per_step"] <= 3 * forward
    # Achieved work cannot exceed what the hardware just showed it can do (both counted alike):
    # an efficiency above 1 would mean the two sides are counted differently.
    assert 0 < step["flops_per_s"] / peak["peak"] < 1
    rows = train_rows({step["precision"]: peak}, [step], common.PROFILES["smoke"])
    assert [r.measure.split(" (")[0] for r in rows if r.measure.startswith("efficiency")] == ["efficiency"]



def test_interleaved_speed_up_is_the_median_of_its_rounds():
    # bench/throughput.precision_gain: the median of per-round fp32 / bf16 time ratios lies within
    # the rounds' range (definition of the median); each format's step is timed on the standard
    # library's clock, so its median step time is below the call's wall time
    from kinecast.model.precision import bf16_supported

    if not bf16_supported("cpu"):
        pytest.skip("no native bfloat16 on this CPU: the bench leaves the speed-up row out")
    t0 = time.perf_counter()
    g = throughput.precision_gain(16, 4, 3, CPU, steps=1)
    wall = time.perf_counter() - t0
    assert g["rounds"] == 3 and 0 < g["gain_lo"] <= g["gain"] <= g["gain_hi"]
    assert 0 < g["fp32_s"] + g["bf16_s"] < wall
    rows = train_rows({}, [], common.PROFILES["smoke"], [g])
    assert [r.measure for r in rows] == ["bf16 step speed-up over fp32 (16 px, median of 3 interleaved rounds)"]

def test_child_peak_rss_sees_a_known_allocation():
    # 2**25 float64 values written by np.ones are 2**25 × 8 bytes = 256 MiB resident (numpy's itemsize
    # for float64 is 8 bytes); the child's reported peak must exceed a bare child's by about that.
    n = 2 ** 25
    tail = "from bench.rss import report; report()"
    bare = rss.run_child([sys.executable, "-c", f"import numpy; {tail}"], cwd=ROOT)
    big = rss.run_child([sys.executable, "-c", f"import numpy; a = numpy.ones({n}); {tail}"], cwd=ROOT)
    assert bare["returncode"] == 0 and big["returncode"] == 0
    grown = big["peak_rss_bytes"] - bare["peak_rss_bytes"]
    assert 0.95 * n * 8 < grown < 1.2 * n * 8
    # and the parent's own size (torch loaded here) does not leak into a child's figure
    assert bare["peak_rss_bytes"] < rss.own_peak_rss()


def test_video_read_ratio_on_a_tiny_clip(tmp_path):
    frames = throughput.pendulum_frames(16, 12)
    path = video_read.write_video(frames, tmp_path / "clip.mp4", upscale=2)
    t0 = time.perf_counter()
    got = video_read.read_ratio(path, 16, repeats=1)
    wall = time.perf_counter() - t0
    # An mp4 written frame by frame reads back with the same number of frames (codec round trip),
    # as OpenCV's independent decoder counts them.
    cap = cv2.VideoCapture(str(path))
    counted = int(cap.get(cv2.CAP_PROP_FRAME_COUNT))
    cap.release()
    assert got["frames"] == 12 == counted
    # One timed read each: both fit, one after the other, in the call's wall time on the standard
    # library's clock (time.perf_counter); a unit slip (ms for s) or a wrong count would not.
    assert 0 < got["raw_s"] and 0 < got["kinecast_s"] and got["raw_s"] + got["kinecast_s"] <= wall


def test_table_goals_and_result_files(tmp_path):
    rows = [common.goal_row("a", "above goal", 0.5, "0.5", 0.35, "≥ 0.35"),
            common.goal_row("a", "over a ceiling", 2e9, "2 GB", 1.5e9, "≤ 1.5 GB", higher_is_better=False),
            common.goal_row("a", "unmeasured", math.nan, "n/a", 0.8, "≥ 0.8"),
            common.Row("b", "no goal", "pipe | inside")]
    assert [r.met for r in rows] == [True, False, None, None]
    report = common.Report("smoke", meta={"notes": ["a note"]}, rows=rows, raw={"x": math.nan, "y": [1.0]})
    md, js = report.write(tmp_path, "smoke")
    text = md.read_text()
    table = [ln for ln in text.splitlines() if ln.startswith("|")]
    assert len(table) == 2 + len(rows)
    assert all(ln.count("|") == 6 for ln in table)  # five cells each; the pipe in a value is escaped
    assert "| yes |" in table[2] and "| no |" in table[3]
    assert "not for safety-critical control" in text
    data = json.loads(js.read_text())  # strict JSON: NaN written as null
    assert data["raw"] == {"x": None, "y": [1.0]}
    assert [r["measure"] for r in data["rows"]] == [r.measure for r in rows]


def test_profiles_keep_the_quick_run_smaller_than_the_full_one():
    full, quick = common.PROFILES["full"], common.PROFILES["quick"]
    assert quick.rigs and set(quick.rigs) <= set(full.rigs)
    assert set(quick.train_sizes) <= set(full.train_sizes)
    from kinecast.config import parse_budget
    assert parse_budget(quick.budget) < parse_budget(full.budget)
    assert np.all(np.diff(full.memory_frames) > 0)


def test_coverage_rows_judge_against_the_issue_goal():
    # The scores issue's goal for both coverages at a nominal 0.90 band: 0.85-0.95 (bench.quality
    # COVERAGE_GOAL). A calibrated 0.90 meets it, an over-confident 0.30 and an over-wide 0.99 do not,
    # and a coverage that could not be measured (NaN) is neither.
    from bench.quality import COVERAGE_GOAL
    from bench.rows import coverage_rows

    assert COVERAGE_GOAL == (0.85, 0.95)
    rows = coverage_rows("pendulum", {"second_order": {"position": 0.90, "object band": 0.30},
                                      "first_order": {"position": 0.99, "object band": math.nan}})
    got = {r.measure.split(" coverage")[0]: r.met for r in rows if r.area == "coverage"}
    assert got == {"pendulum: second_order position": True, "pendulum: second_order object band": False,
                   "pendulum: first_order position": False, "pendulum: first_order object band": None}
    # the number of held-out trials the coverage was judged on is part of the measure's name
    assert all("12 held-out trials" in r.measure for r in coverage_rows("spring", {"x": {"position": 0.9}}, 12))
    assert all("held-out" not in r.measure for r in rows)
    # the form bench.quality.coverages stores: judged by the mean, the interval shown beside it
    (row,) = coverage_rows("spring", {"x": {"position": {"mean": 0.83, "interval": (0.78, 0.88),
                                                         "trials": [0.8, 0.86]}}}, 12)
    assert row.met is False and "0.83" in row.value and "0.78-0.88" in row.value


def test_mean_interval_matches_the_normal_theory_interval():
    # For many trials the bootstrap percentile interval of a mean approaches the normal-theory one,
    # mean ± z(0.95) · s / √n with z(0.95) = 1.6449 (central limit theorem; Efron & Tibshirani 1993,
    # ch. 13; the quantile from scipy.stats.norm). Independent numpy draws stand in for per-trial coverages.
    from scipy.stats import norm

    from bench.common import mean_interval

    x = np.random.default_rng(3).normal(0.9, 0.1, size=400)
    lo, hi = mean_interval(x, 0.9)
    half = norm.ppf(0.95) * x.std(ddof=1) / np.sqrt(len(x))
    assert abs((hi - lo) / 2 - half) < 0.15 * half
    assert abs((hi + lo) / 2 - x.mean()) < 0.2 * half
    # twice the trials: the interval narrows by about √2
    lo2, hi2 = mean_interval(np.concatenate([x, x + 1e-9]), 0.9)
    assert 1.2 < (hi - lo) / (hi2 - lo2) < 1.65
    # NaN trials are left out; fewer than two finite values give no interval; trials that all agree
    # (every trial covered, as on the ball) give a point: every resample has the same mean
    assert np.isnan(mean_interval([0.9, math.nan])).all()
    assert mean_interval([1.0, 1.0, math.nan, 1.0]) == (1.0, 1.0)


def test_time_to_quality_rows_judge_each_rig_against_the_issue_goal():
    # The speed issue's goals: the pendulum's 3·W forecast MSE at ≤ 1/10 of persistence's within
    # 120 s of training, every other rig within 300 s (bench.quality TTQ_GOAL_S / TTQ_GOAL_OTHER_S).
    from bench.quality import TTQ_GOAL_OTHER_S, TTQ_GOAL_S
    from bench.rows import time_to_quality_rows

    assert TTQ_GOAL_S == {"pendulum": 120.0} and TTQ_GOAL_OTHER_S == 300.0
    at = lambda s: {"reached": {"time_s": s, "step": 10}, "best_ratio": 0.05, "curve": [{}]}
    never = {"reached": None, "best_ratio": 0.6, "curve": [{}, {}]}
    met = lambda rig, t: [r.met for r in time_to_quality_rows(rig, {"second_order": t}, "5m")]
    assert met("pendulum", at(150.0)) == [False] and met("pendulum", at(110.0)) == [True]
    assert met("spring", at(150.0)) == [True] and met("spring", at(310.0)) == [False]
    assert met("airtable", never) == [False]
    assert "not reached in 5m" in time_to_quality_rows("airtable", {"first_order": never}, "5m")[0].value


def test_recipe_bench_rates_stages_and_judges_by_the_issue_rules(tmp_path):
    # Steps per second by stage from log.csv: hand-computed from the rows below (stage 1 steps 10-30
    # in 1 s, stage 2 steps 40-80 in 2 s). Success rules from the learning issue: one object ≤ 2 px
    # @60 and period within 3 %; the air table per puck ≤ 3 px @20, whatever the tracker's count of
    # pieces (a ball and its shadow are two pieces, still one object).
    from bench import recipe
    from kinecast.runfolder import write_log

    write_log(tmp_path, [{"step": 10, "time_s": 1.0, "stage": 1}, {"step": 30, "time_s": 2.0, "stage": 1},
                         {"step": 40, "time_s": 3.0, "stage": 2}, {"step": 80, "time_s": 5.0, "stage": 2}])
    assert recipe.stage_rates(tmp_path) == {"positions": 20.0, "dynamics": 20.0}
    ball = {"rig": "foreign", "objects": 2.0, "pos_model": 2.9, "obj20_model": 2.4, "period_truth": math.nan,
            "period_error": math.nan}
    assert not recipe.succeeded(ball) and recipe.succeeded(dict(ball, pos_model=1.9))
    assert recipe.succeeded(dict(ball, rig="airtable")) and not recipe.succeeded(dict(ball, rig="airtable", obj20_model=3.1))
    assert not recipe.succeeded({"rig": "pendulum", "pos_model": 1.0, "period_truth": 1.0, "period_error": 0.04})
    # time to quality per rig × look: a run that never got there counts as its 5-minute budget (300 s),
    # so the median of 100, 200 and never is 200 (not 150 over the two that did); older rows: "-"
    runs = [{"budget": "5m", "ttq_s": 100.0}, {"budget": "5m", "ttq_s": None}, {"budget": "5m", "ttq_s": 200.0}]
    assert recipe.ttq_cell(runs) == "2/3 reached; 200 (100-300)"
    assert recipe.ttq_cell(runs[:2] + [{"budget": "5m"}]) == "1/2 reached; 200 (100-300)"
    assert recipe.ttq_cell([{"budget": "5m"}]) == "-"


def test_recipe_bench_puts_todays_runs_beside_the_old_recipe_and_fp32():
    # Rows built by hand: a rig × look appears in a comparison only when both sides have runs, and
    # each side's cells are that side's own medians (median of 1.0 and 3.0 px is 2.0; of 0.5, 0.5).
    from bench import recipe

    base = {"budget": "5m", "tracker": recipe.TRACKER, "scoring": recipe.SCORING, "look": "classic",
            "period_error": 0.01, "mse_model": 1.0, "mse_background_only": 2.0, "period_truth": 1.0,
            "mse_persistence": 4.0, "pos20_model": 1.0, "verdict": "good"}
    today = [dict(base, rig="spring", seed=s, recipe="staged", defaults=recipe.DEFAULTS, sets=[], pos_model=p)
             for s, p in ((1, 1.0), (2, 3.0))]
    old = [dict(base, rig="spring", seed=1, recipe="end_to_end", defaults=recipe.DEFAULTS,
                sets=["model.encoder=dense"], pos_model=0.5),
           dict(base, rig="ball", seed=1, recipe="end_to_end", defaults=recipe.DEFAULTS,
                sets=["model.encoder=dense"], pos_model=9.0)]
    keypoints = dict(old[0], sets=[])  # end to end with today's keypoint encoder: not the old recipe
    fp32 = [dict(base, rig="spring", seed=3, recipe="staged", defaults=recipe.DEFAULTS,
                 sets=["train.precision=fp32"], pos_model=0.5)]
    rows = today + old + fp32 + [keypoints]
    assert recipe.old_recipe_rows(rows) == old and recipe.fp32_rows(rows) == fp32
    table = recipe.side_by_side_table(rows, recipe.old_recipe_rows(rows), ("today", "old"))
    body = [line for line in table.splitlines()[2:]]
    assert [line.split(" | ")[2:6] for line in body] == [["today", "2 (1,2)", "1/2", "2.00 (1.00-3.00)"],
                                                         ["old", "1 (1)", "1/1", "0.50 (0.50-0.50)"]]
    assert "ball" not in table  # no run of today's defaults on the ball here
    # MSE / persistence 1.0 / 4.0 = 0.25 on every row; no row measured time to quality ("-")
    assert all(line.split(" | ")[-2:] == ["0.25 (0.25-0.25)", "- |"] for line in body)
    # pooled over looks: the spring's two classic runs and one dark-on-light run make one line of 3
    # runs over 2 looks, 2 of them within 2 px, median of 1.0, 3.0 and 1.5 px = 1.5
    # a scene drawn by bench/foreign.py is no rig's look: it keeps a line of its own
    foreign = dict(today[0], rig="foreign", look="rod_pendulum", seed=5, pos_model=0.5)
    pooled = recipe.success_table(today + [dict(today[0], look="dark_on_light", seed=4, pos_model=1.5), foreign],
                                  pool_looks=True)
    assert [line.split(" | ")[:5] for line in pooled.splitlines()[2:]] == [
        ["| foreign", "rod_pendulum", "1 (5)", "1/1", "0.50 (0.50-0.50)"],
        ["| spring", "2 looks", "3 (1,2,4)", "2/3", "1.50 (1.00-3.00)"]]
    # every line of a markdown table has as many cells as its header (CommonMark tables, GFM spec)
    assert len({line.count("|") for line in pooled.splitlines()}) == 1
    assert "bfloat16 beside float32" in recipe.page(rows) and "beside the old one" in recipe.page(rows)
    assert recipe.side_by_side_table(today, [], ("today", "old")) == ""


def test_cpu_facts_read_the_model_and_bf16_flags():
    # /proc/cpuinfo's "key<TAB>: value" lines as the Linux kernel writes them (Documentation/
    # filesystems/proc.rst; "flags" lists the CPU features by their kernel names, e.g. avx512_bf16
    # and amx_tile on x86, arch/x86/include/asm/cpufeatures.h)
    from bench.common import _cpu_words, cpu_facts

    text = ("processor\t: 0\nvendor_id\t: AuthenticAMD\nmodel name\t: AMD EPYC 9R14\n"
            "flags\t\t: fpu sse2 avx512f avx512_bf16 avx512_vnni\n\nprocessor\t: 1\n")
    facts = cpu_facts(text)
    assert facts == {"cpu_model": "AMD EPYC 9R14", "bf16_flags": ["avx512_bf16"]}
    assert _cpu_words(facts) == "AMD EPYC 9R14, bf16 flags: avx512_bf16"
    assert _cpu_words({**facts, "keep_heap": True}).endswith("; large freed blocks kept (train.keep_heap)")
    assert cpu_facts("model name\t: X\nflags\t: sse2\n")["bf16_flags"] == []
    assert _cpu_words({}) == "CPU model not recorded"


def test_checkpoint_watcher_copies_only_this_runs_weights(tmp_path):
    """A weights file left in the run folder by an earlier run is not a checkpoint of this one (the
    bench reuses its work folders); one written during the run is copied. Plain file bookkeeping."""
    import os

    from bench.quality import CheckpointWatcher
    from kinecast import runfolder as rf

    run = tmp_path / "run"
    run.mkdir()
    (run / rf.WEIGHTS).write_bytes(b"old run")
    with CheckpointWatcher(run, tmp_path / "snaps") as watch:
        pass
    assert watch.copies == []
    with CheckpointWatcher(run, tmp_path / "snaps2") as watch:
        (run / rf.WEIGHTS).write_bytes(b"this run's best")
        os.utime(run / rf.WEIGHTS, ns=(1, 1))  # a different modification time, whatever the clock's grain
    assert [(c / rf.WEIGHTS).read_bytes() for c in watch.copies] == [b"this run's best"]


def test_calibration_split_reads_the_scale_off_a_known_coverage_curve():
    # A 2-D standard normal lies within radius r with probability 1 - exp(-r^2 / 2) (the Rayleigh
    # law, closed form). With a region of radius s * r1 at scale s, the scale that covers 0.90 is
    # sqrt(2 ln 10) / r1; the study's reading of its coverage curves must find it, and read the
    # curve back at any scale inside the grid.
    from bench.calibration_split import asked_for, at_scale

    r1 = 0.8
    scales = list(np.geomspace(0.3, 6.0, 40))
    cover = np.array([[1 - math.exp(-(s * r1) ** 2 / 2)] * 3 for s in scales])  # three alike trials
    want = math.sqrt(2 * math.log(10)) / r1
    assert asked_for(scales, cover, 0.9) == pytest.approx(want, rel=1e-2)
    assert at_scale(scales, cover, want) == pytest.approx(0.9, abs=2e-3)
    assert math.isnan(asked_for(scales[:5], cover[:5], 0.9))  # the grid never reaches 0.90


def test_calibration_split_refuses_too_few_trials_for_its_groups(capsys):
    # 3 groups of 4 held-out trials leave at least 2 others only with 14 trials: 13 are refused
    # with one line and argparse's usage exit (2), before the run or any trial is read (the paths
    # here do not exist).
    from bench.calibration_split import main

    with pytest.raises(SystemExit) as stop:
        main(["no-such-run"] + [f"no-such-trial-{i}" for i in range(13)] + ["--group", "4", "--groups", "3"])
    assert stop.value.code == 2
    assert "13 trials: 3 groups of 4 need at least 14" in capsys.readouterr().err


def test_calibration_trials_reads_one_trials_needed_scale_off_its_curve():
    # One trial's coverage at scale s of a 2-D standard normal region of radius s * r1 is
    # 1 - exp(-(s r1)^2 / 2) (the Rayleigh law, closed form), so it needs sqrt(2 ln 10) / r1 for 0.90.
    from bench.calibration_trials import needed_scale

    r1 = 0.8
    scales = np.geomspace(0.3, 6.0, 40)
    curve = 1 - np.exp(-(scales * r1) ** 2 / 2)
    assert needed_scale(scales, curve, 0.9) == pytest.approx(math.sqrt(2 * math.log(10)) / r1, rel=1e-2)
    assert needed_scale(scales, np.full(40, 0.95), 0.9) == pytest.approx(0.3)        # covered everywhere
    assert needed_scale(scales, np.full(40, 0.5), 0.9) == pytest.approx(1.5 * 6.0)   # never covered
