"""Trainer: run folder contents, determinism, resume, curriculum, faults, bad input.

These tests check the trainer's own promises (reproducibility with a fixed seed is common practice
for PyTorch: torch.manual_seed + same thread count gives bit-identical CPU results, per the PyTorch
"Reproducibility" notes). Learning quality is measured in bench/, not here.
"""

import json
import math

import pytest
import torch

from kinecast import config as C
from kinecast.cli import main
from kinecast.errors import KinecastError
from kinecast.rigs import write_rig
from kinecast.train import fit, load_run
from kinecast import runfolder as rf
from kinecast.train import schedule as sched_mod
from kinecast.train.schedule import Curriculum, kl_weight, learning_rate, may_stop_early, stage_learning_rate


def small_cfg(**train):
    cfg = C.apply_overrides(C.Config(), [
        "data.size=32", "model.latent_dim=4", "model.enc_channels=8", "model.dec_channels=8",
        "model.hidden=16", "train.batch=4", "train.val_every=5", "train.checkpoint_every=5",
        "train.window_start=6", "train.threads=1", "train.budget=0", "train.warmup_steps=2",
    ] + [f"train.{k}={v}" for k, v in train.items()])
    cfg.data.cache = False
    return cfg


@pytest.fixture(scope="module")
def rig(tmp_path_factory):
    out = tmp_path_factory.mktemp("rig") / "pendulum"
    write_rig("pendulum", out, trials=3, frames=24, seed=1, size=32, fps=20.0)
    return out


def weights(run):
    return rf.load_tensors(run / rf.WEIGHTS)[0]


def test_run_folder_has_every_promised_file(rig, tmp_path):
    run = tmp_path / "run"
    summary = fit([rig], run, small_cfg(steps=12), show_progress=False)
    for name in (rf.CONFIG, rf.WEIGHTS, rf.RESUME, rf.LOG, rf.SUMMARY, rf.BACKGROUND, rf.LOSS_PLOT):
        assert (run / name).is_file(), name
    assert summary["steps"] == 12 and summary["train_recordings"] == 2 and summary["val_recordings"] == 1
    # the trials trained on and validated on are named, and split the recordings given
    assert len(summary["trained_on"]) == 2 and len(summary["validated_on"]) == 1
    assert sorted(summary["trained_on"] + summary["validated_on"]) == sorted(summary["recordings"])
    cfg = C.load(run / rf.CONFIG)
    # time scale resolved from the data: units_per_frame / median interval (1/20 s)
    assert cfg.solver.time_scale == pytest.approx(0.1 * 20.0)
    assert json.loads((run / rf.SUMMARY).read_text())["steps"] == 12
    model, cfg2 = load_run(run)
    assert cfg2 == cfg and not model.training
    log = rf.read_log(run)
    assert any("val_mse" in r for r in log) and any("nll" in r for r in log)
    assert not list(run.glob(".*tmp*")), "temporary files left behind"


def test_same_seed_same_weights_and_other_seed_differs(rig, tmp_path):
    a = fit([rig], tmp_path / "a", small_cfg(steps=6), show_progress=False)
    b = fit([rig], tmp_path / "b", small_cfg(steps=6), show_progress=False)
    c = fit([rig], tmp_path / "c", small_cfg(steps=6, seed=7), show_progress=False)
    wa, wb, wc = (weights(tmp_path / n) for n in "abc")
    assert a["steps"] == b["steps"] == 6
    assert all(torch.equal(wa[k], wb[k]) for k in wa)
    assert any(not torch.equal(wa[k], wc[k]) for k in wa)


def test_resume_continues_and_matches_an_uninterrupted_run(rig, tmp_path):
    fit([rig], tmp_path / "full", small_cfg(steps=10), show_progress=False)

    def interrupt(step):  # stands in for a kill after the checkpoint at step 5
        if step == 7:
            raise KeyboardInterrupt
        return False

    with pytest.raises(KeyboardInterrupt):
        fit([rig], tmp_path / "part", small_cfg(steps=10), show_progress=False, fault_hook=interrupt)
    assert rf.load_tensors(tmp_path / "part" / rf.RESUME)[1]["step"] == 5
    summary = fit([], tmp_path / "part", small_cfg(steps=10), resume=True, show_progress=False)
    assert summary["steps"] == 10
    full = rf.load_tensors(tmp_path / "full" / rf.RESUME)[0]
    part = rf.load_tensors(tmp_path / "part" / rf.RESUME)[0]
    # step count, optimiser, schedule and random state all continue: same tensors as one long run
    for key in full:
        assert torch.allclose(full[key].float(), part[key].float(), atol=1e-6), key


def test_injected_fault_rolls_back_and_repeated_faults_stop(rig, tmp_path):
    fired = []

    def once(step):  # one non-finite loss at step 3
        if step == 3 and not fired:
            fired.append(step)
            return True
        return False

    summary = fit([rig], tmp_path / "f1", small_cfg(steps=8), show_progress=False, fault_hook=once)
    assert summary["faults"] == 1 and summary["steps"] == 8
    with pytest.raises(KinecastError, match="non-finite"):
        fit([rig], tmp_path / "f2", small_cfg(steps=8, max_faults=2), show_progress=False,
            fault_hook=lambda step: step >= 2)
    assert (tmp_path / "f2" / rf.WEIGHTS).is_file()  # the best checkpoint is kept


def test_schedules():
    cfg = C.TrainConfig(lr=1.0, warmup_steps=10, lr_min_ratio=0.1, kl_warmup=0.2)
    assert learning_rate(cfg, 0, 0.0) == pytest.approx(0.1)
    assert learning_rate(cfg, 100, 0.0) == pytest.approx(1.0)
    assert learning_rate(cfg, 100, 1.0) == pytest.approx(0.1)
    assert kl_weight(cfg, 0.1) == pytest.approx(0.5) and kl_weight(cfg, 0.5) == 1.0
    cur = Curriculum(window=8, longest=20, growth=1.5, patience=2)
    assert cur.update(1.0)
    cur.update(1.0), cur.update(1.0)
    assert cur.window == 12 and not cur.done
    for _ in range(10):
        cur.update(2.0)
    assert cur.window == 20 and cur.done
    # scores that only keep the best (the staged recipe's dynamics stage) never grow nor stop
    keep = Curriculum(window=8, longest=8, growth=1.5, patience=2)
    assert keep.update(1.0, stalls=False) and not keep.update(2.0, stalls=False)
    for _ in range(10):
        keep.update(2.0, stalls=False)
    assert keep.stalls == 0 and not keep.done and keep.best == 1.0
    assert keep.update(0.5, stalls=False) and keep.best == 0.5
    # the joint stage then stalls against its own best, not against the kept 0.5: an improving
    # series above 0.5 is no stall, and it keeps none of its weights (0.5 stays the best)
    assert not any(keep.update(v) for v in (1.0, 0.9, 0.8, 0.7))
    assert keep.stalls == 0 and not keep.done and keep.best == 0.5
    keep.update(0.8), keep.update(0.8)
    assert keep.done  # two stalls at the longest window (patience 2)
    # a later improvement ends the stall: the run is no longer done
    assert keep.update(0.6) is False and not keep.done and keep.stalls == 0
    # scheduled floor: geometric growth 8 -> 32 reaches 16 at half of the schedule, 32 at its end
    sched = Curriculum(window=8, longest=32, growth=1.5, patience=2)
    sched.follow(8, 0.3, 0.6)
    assert sched.window == 16
    sched.follow(8, 0.6, 0.6)
    assert sched.window == 32
    sched.follow(8, 0.1, 0.6)
    assert sched.window == 32  # never shrinks


def test_bad_input_exit_2_and_nothing_overwritten(rig, tmp_path, capsys):
    run = tmp_path / "exists"
    run.mkdir()
    (run / "keep.txt").write_text("mine")
    assert main(["fit", str(rig), "--out", str(run), "--steps", "2"]) == 2
    assert (run / "keep.txt").read_text() == "mine" and len(list(run.iterdir())) == 1
    assert main(["fit", "--resume", str(run)]) == 2  # not a run folder
    assert main(["fit", str(rig), "--out", str(tmp_path / "x"), "--budget", "soon"]) == 2
    assert main(["fit", "--out", str(tmp_path / "y")]) == 2  # no recordings
    assert main(["fit", str(rig), "--out", str(rig / "trial_000" / "run"), "--steps", "2"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 5 and all(line.startswith("kinecast: error:") for line in err)
    assert "already exists" in err[0] and "not a complete run folder" in err[1] and "train.budget" in err[2]
    assert "inside the input" in err[4]


def test_early_stop_waits_for_its_share_of_the_budget():
    tc = C.TrainConfig(early_stop_from=0.7)
    # the 0.8 floor against the bare background is the verdict's (kinecast.config.FLOOR_MARGIN)
    assert may_stop_early(0.5, 1.0, 0.7, tc) and not may_stop_early(0.5, 1.0, 0.69, tc)
    assert not may_stop_early(0.85, 1.0, 0.9, tc)  # does not clearly beat drawing the background
    assert not may_stop_early(0.5, math.nan, 0.9, tc)  # no background to compare with


@pytest.mark.parametrize("share, steps", [(0.0, 2), (0.5, 10), (1.0, 20)])
def test_a_stall_ends_the_run_only_from_its_share(rig, tmp_path, monkeypatch, share, steps):
    # every validation (each 2nd step) is a stall at the longest window; the background floor is lifted
    # so that only the share decides. With a 20-step budget the progress is step / 20 (hand-computed):
    # share 0 ends at the first validation (step 2), share 0.5 at step 10, share 1 runs the budget
    monkeypatch.setattr(sched_mod, "FLOOR_MARGIN", math.inf)

    def stalled(self, val, stalls=True):
        self.best, self.done = min(self.best, val), True
        return False

    monkeypatch.setattr(Curriculum, "update", stalled)
    cfg = small_cfg(steps=20, val_every=2, patience=1, window_start=24, window_max=24, early_stop_from=share,
                    recipe="end_to_end")
    summary = fit([rig], tmp_path / "run", cfg, show_progress=False)
    assert summary["steps"] == steps
    assert summary["stop_reason"] == ("budget" if steps == 20 else "early stop: validation stalled at the longest window")


def test_the_weight_average_is_a_first_order_recursive_filter():
    # Exponential smoothing y[n] = (1 - a) x[n] + a y[n-1] is the first-order IIR filter with
    # b = [1 - a], a = [1, -a] (scipy.signal.lfilter, initial state y[-1] = the starting weight).
    # A decay of 0.05 sits under the start-up ramp ((1 + n) / (10 + n) >= 2/11) at every update, so
    # the filter's coefficient is constant.
    import numpy as np
    from scipy.signal import lfilter, lfiltic
    from kinecast.train.average import WeightAverage

    decay = 0.05
    net = torch.nn.Linear(1, 1, bias=False)
    with torch.no_grad():
        net.weight.fill_(0.3)
    avg = WeightAverage(decay)
    avg.start(net, "dynamics")
    xs = np.random.default_rng(0).normal(size=12)
    for x in xs:
        with torch.no_grad():
            net.weight.fill_(float(x))
        avg.update(net)
    ref = lfilter([1 - decay], [1, -decay], xs, zi=lfiltic([1 - decay], [1, -decay], [0.3]))[0]
    with avg.applied(net):  # float32 weights: a few units of its epsilon (1.2e-7) on values near 1
        assert float(net.weight.detach()) == pytest.approx(ref[-1], abs=1e-6)
    assert float(net.weight.detach()) == pytest.approx(xs[-1])  # the model's own weights again after the block
    off = WeightAverage(0.0)
    off.start(net, "dynamics")
    off.update(net)
    assert off.tensors is None and off.state() == ({}, {"updates": 0, "stage": None})


@pytest.mark.parametrize("decay", [0.0, 0.98])
def test_validation_scores_and_keeps_the_averaged_weights(rig, tmp_path, monkeypatch, decay):
    # The weights validated (and so kept) are the running average; training goes on from the raw
    # weights. The last validation (step 10) and the final resume checkpoint see the same step.
    from kinecast.train import loop as loop_mod
    seen = []
    real = loop_mod._validate_and_keep

    def spy(model, *args, **kwargs):
        seen.append([p.detach().clone() for p in model.parameters()])
        return real(model, *args, **kwargs)

    monkeypatch.setattr(loop_mod, "_validate_and_keep", spy)
    fit([rig], tmp_path / "run", small_cfg(steps=10, weight_average=decay), show_progress=False)
    tensors, meta = rf.load_tensors(tmp_path / "run" / rf.RESUME)
    model, _ = load_run(tmp_path / "run")
    names = [n for n, _ in model.named_parameters()]
    raw = [tensors[n] for n in names]
    averaged = [tensors.get(f"average.{i}") for i in range(len(names))]
    last = seen[-1]
    if decay == 0:
        assert averaged == [None] * len(names) and meta["average"]["stage"] is None
        assert all(torch.equal(a, b) for a, b in zip(last, raw))
    else:
        assert meta["average"]["stage"] == "joint" and meta["average"]["updates"] > 0
        assert all(torch.equal(a, b) for a, b in zip(last, averaged))
        assert any(not torch.equal(a, b) for a, b in zip(last, raw))


def test_stage_learning_rates():
    # Linear warm-up then cosine decay (common practice: Goyal et al. 2017, "Accurate, large minibatch
    # SGD", for the warm-up; Loshchilov & Hutter 2017, "SGDR", for the cosine), each staged stage at
    # its own peak; the joint stage's warm-up is linear in the stage's own progress.
    cfg = C.TrainConfig(lr=1.0, positions_lr=10.0, joint_lr=0.1, warmup_steps=0, lr_min_ratio=0.0,
                        joint_warmup=0.2)
    cosine = lambda x: 0.5 * (1 + math.cos(math.pi * x))  # noqa: E731
    assert stage_learning_rate(cfg, 500, "positions", 0.5) == pytest.approx(10.0 * cosine(0.5))
    assert stage_learning_rate(cfg, 500, "dynamics", 0.5) == pytest.approx(cosine(0.5))
    assert stage_learning_rate(cfg, 500, "joint", 0.0) == 0.0
    assert stage_learning_rate(cfg, 500, "joint", 0.1) == pytest.approx(0.1 * cosine(0.1) * 0.5)
    assert stage_learning_rate(cfg, 500, "joint", 0.6) == pytest.approx(0.1 * cosine(0.6))
    cfg.joint_warmup = 0.0
    assert stage_learning_rate(cfg, 500, "joint", 0.0) == pytest.approx(0.1)
    cfg.recipe = "end_to_end"  # one stage at train.lr, whatever its name
    assert stage_learning_rate(cfg, 500, "joint", 0.5) == pytest.approx(cosine(0.5))


def on_joint_entry(monkeypatch, look):
    """Call ``look(trainer)`` right after the trainer has entered the joint stage."""
    from kinecast.train import loop as loop_mod
    real = loop_mod._Trainer._enter

    def spy(self, stage, elapsed):
        real(self, stage, elapsed)
        if stage == "joint":
            look(self)

    monkeypatch.setattr(loop_mod._Trainer, "_enter", spy)


@pytest.mark.parametrize("fresh", [True, False])
def test_the_joint_stage_may_forget_the_positions_moments(rig, tmp_path, monkeypatch, fresh):
    # Steps 1-2 positions, 3-4 dynamics, then the joint stage (as in the test below). Frozen parameters
    # get no Adam step, so without the option the position encoder's statistics from the positions
    # stage are still there when the joint stage starts.
    seen = {}

    def look(trainer):
        held = {id(p) for p in trainer.opt.state}
        seen["pos"] = [id(p) in held for p in trainer.model.pos_enc.parameters() if p.requires_grad]
        seen["field"] = [id(p) in held for p in trainer.model.field.parameters() if p.requires_grad]

    on_joint_entry(monkeypatch, look)
    fit([rig], tmp_path / "run", small_cfg(steps=8, joint_fresh_moments=str(fresh).lower()), show_progress=False)
    assert any(seen["field"])  # the field keeps its statistics either way
    assert not any(seen["pos"]) if fresh else any(seen["pos"])


@pytest.mark.parametrize("from_best", [True, False])
def test_the_joint_stage_starts_from_the_kept_weights(rig, tmp_path, monkeypatch, from_best):
    # Steps 1-2 are the positions stage, 3-4 the dynamics stage (validated at step 3's entry check and
    # step 5's), then the joint stage: with train.joint_from_best it starts from the weights file kept
    # so far, not from the dynamics stage's last step (with it off, from the dynamics stage's average).
    seen = {}

    def look(trainer):
        seen["model"] = {k: v.clone() for k, v in trainer.model.state_dict().items()}
        seen["kept"] = rf.load_tensors(trainer.run / rf.WEIGHTS)[0]
        seen["average"] = [a.clone() for a in trainer.state.average.tensors]

    on_joint_entry(monkeypatch, look)
    cfg = small_cfg(steps=12, val_every=2, joint_from_best=str(from_best).lower())
    fit([rig], tmp_path / "run", cfg, show_progress=False)
    names = list(dict(load_run(tmp_path / "run")[0].named_parameters()))
    if from_best:
        assert all(torch.equal(seen["model"][n], seen["kept"][n]) for n in names)
    else:
        assert any(not torch.equal(seen["model"][n], seen["kept"][n]) for n in names)
    # either way the joint stage's average starts from the weights it trains on
    assert all(torch.equal(seen["model"][n], a) for n, a in zip(names, seen["average"]))
