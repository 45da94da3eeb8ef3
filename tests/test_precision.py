"""Number format of the conv nets (``train.precision``): bfloat16 where the hardware has it.

References
----------
- bfloat16 keeps 8 significant bits, so each rounding is off by at most 2⁻⁸ ≈ 0.4 % of the value
  (format: Kalamkar et al. 2019, arXiv:1905.12322). A conv stack of a few layers that rounds its
  inputs and weights at every layer stays within a few of those: the 4 % bound below is a generous
  allowance (common practice for mixed-precision comparisons, not a published figure).
- Bit-identical repeats with the same seed and thread count: PyTorch "Reproducibility" notes.
"""

import subprocess
import sys

import pytest
import torch

from kinecast import config as C
from kinecast.errors import KinecastError
from kinecast.model import build_model
from kinecast.model import precision as P
from kinecast.train import fit, load_run
from kinecast import runfolder as rf
from test_train import rig, small_cfg  # noqa: F401  (the trainer tests' tiny pendulum clip and config)

HAS_BF16 = P.bf16_supported("cpu")
needs_bf16 = pytest.mark.skipif(not HAS_BF16, reason="this CPU has no native bfloat16 (oneDNN check)")
REL_TOL = 0.04  # see the module docstring


def cfg_in(fmt: str, steps: int = 8):
    """test_train's small config, in number format ``fmt``."""
    return small_cfg(steps=steps, precision=fmt)


def rel_err(a: torch.Tensor, b: torch.Tensor) -> float:
    return float((a - b).abs().max() / b.abs().max().clamp_min(1e-12))


def twin_models(setting: str):
    """Two default 64 px models with ``setting`` and the same weights and background: float32, and
    the same in bf16; and that background."""
    torch.manual_seed(0)
    cfg = C.apply_overrides(C.Config(), [setting])
    ref, low = build_model(cfg, 1), build_model(cfg, 1)
    bg = torch.rand(1, 64, 64) * 0.8 + 0.1
    ref.set_background(bg)
    low.load_state_dict(ref.state_dict())
    assert P.use_precision(low, "bf16") == "bf16"
    return ref, low, bg

@needs_bf16
@pytest.mark.parametrize("encoder", ["keypoints", "dense"])
def test_bf16_conv_stacks_agree_with_fp32(encoder):
    ref, low, _ = twin_models(f"model.encoder={encoder}")
    frames = torch.rand(6, 1, 64, 64)
    s = torch.rand(6, ref.q) * 1.6 - 0.8
    with torch.no_grad():
        if encoder == "keypoints":  # the keypoint trunk follows bf16 by default (see the next test)
            pts = low.pos_enc(frames, low.background)[0], ref.pos_enc(frames, ref.background)[0]
            assert float((pts[0] - pts[1]).abs().max()) < 0.01
            pair = (low.decoder(s, low.background), ref.decoder(s, ref.background))
        else:
            pair = (low.decoder(s), ref.decoder(s))
            assert rel_err(low.pos_enc(frames)[0], ref.pos_enc(frames)[0]) < REL_TOL
        assert pair[0].dtype == torch.float32  # what leaves a conv stack is float32 again
        assert rel_err(*pair) < REL_TOL
        # the background's logits are added in float32: against the whole logits the error is far smaller
        assert rel_err(low.decode_logits(s), ref.decode_logits(s)) < 1e-3


@needs_bf16
@pytest.mark.parametrize("low_trunk", [True, False])
def test_keypoint_trunk_in_bf16_reads_the_same_positions(low_trunk):
    # model.keypoint_trunk_low_precision on (the default): the trunk's features are rounded to
    # bfloat16 (2⁻⁸ relative, Kalamkar et al. 2019) before the float32 heat maps; positions are
    # softmax-weighted means of the pixel grid, so a logit error of a few 2⁻⁸ moves them by a few
    # thousandths of the frame's half-width (normalised units; bound 0.01 ≈ 0.3 px at 64 px: our
    # allowance, not a published figure). Off, the encoder stays float32 (only its weights' layout
    # changes): coordinates in [-1, 1] agree to float32 rounding (eps 1.2e-7), far below 2⁻⁸.
    ref, low, bg = twin_models(f"model.keypoint_trunk_low_precision={str(low_trunk).lower()}")
    frames = bg.expand(6, -1, -1, -1).clone()
    for i in range(6):  # a bright square at another place in each frame, so the maps have a peak
        frames[i, :, 10 + 7 * i:18 + 7 * i, 12 + 5 * i:20 + 5 * i] = 1.0
    with torch.no_grad():
        got, want = low.pos_enc(frames, low.background)[0], ref.pos_enc(frames, ref.background)[0]
    assert got.dtype == torch.float32
    gap = float((got - want).abs().max())
    if low_trunk:
        assert 0 < gap < 0.01  # rounded (not float32 throughout), and close
    else:
        assert gap < 1e-6


def test_explicit_bf16_without_hardware_is_refused_in_one_line(rig, tmp_path, monkeypatch):
    monkeypatch.setattr(P, "bf16_supported", lambda device="cpu": False)
    with pytest.raises(KinecastError, match="train.precision.*no native bfloat16"):
        fit([rig], tmp_path / "run", cfg_in("bf16"), show_progress=False)
    assert not (tmp_path / "run").exists()  # refused before the run folder was made
    summary = fit([rig], tmp_path / "auto", cfg_in("auto"), show_progress=False)  # auto falls back
    assert summary["precision"] == "fp32"


def test_cli_refusal_is_one_line_exit_2(rig, tmp_path):
    # a subprocess whose capability check says "no": the line the user sees, and no run folder
    code = ("import sys; from kinecast.model import precision as P; "
            "P.bf16_supported = lambda device='cpu': False; "
            "from kinecast.cli import main; sys.exit(main(sys.argv[1:]))")
    run = tmp_path / "run"
    proc = subprocess.run([sys.executable, "-c", code, "fit", str(rig), "--out", str(run), "--steps", "3",
                           "--set", "train.precision=bf16"], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 2, proc.stderr
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and "train.precision" in lines[0] and "Traceback" not in proc.stderr
    assert not run.exists()


@needs_bf16
@pytest.mark.parametrize("trained, used", [("bf16", "fp32"), ("fp32", "bf16")])
def test_a_run_trained_in_one_format_forecasts_in_the_other(rig, tmp_path, trained, used):
    run = tmp_path / "run"
    summary = fit([rig], run, cfg_in(trained), show_progress=False)
    assert summary["precision"] == trained
    ctx = torch.rand(2, 3, 1, 32, 32)
    t = torch.arange(12, dtype=torch.float32) * 0.1
    frames = {}
    for fmt in (trained, used):
        model, _ = load_run(run, precision=fmt)
        with torch.no_grad():
            frames[fmt] = model.rollout(ctx, t)[0]
        assert torch.isfinite(frames[fmt]).all()
    # same weights, the two formats: the same forecast to within bfloat16 rounding (pixels in [0, 1])
    assert float((frames[trained] - frames[used]).abs().max()) < 0.02


@pytest.mark.parametrize("fmt", ["fp32", pytest.param("bf16", marks=needs_bf16)])
def test_runs_repeat_bit_for_bit_and_resume_in_either_format(rig, tmp_path, fmt):
    cfg = lambda: cfg_in(fmt, steps=10)  # noqa: E731
    fit([rig], tmp_path / "a", cfg(), show_progress=False)
    fit([rig], tmp_path / "b", cfg(), show_progress=False)
    wa, wb = (rf.load_tensors(tmp_path / n / rf.WEIGHTS)[0] for n in "ab")
    assert all(torch.equal(wa[k], wb[k]) for k in wa)

    def interrupt(step):  # a kill after the checkpoint at step 5
        if step == 7:
            raise KeyboardInterrupt
        return False

    with pytest.raises(KeyboardInterrupt):
        fit([rig], tmp_path / "part", cfg(), show_progress=False, fault_hook=interrupt)
    fit([], tmp_path / "part", cfg(), resume=True, show_progress=False)
    full = rf.load_tensors(tmp_path / "a" / rf.RESUME)[0]
    part = rf.load_tensors(tmp_path / "part" / rf.RESUME)[0]
    for key in full:
        assert torch.allclose(full[key].float(), part[key].float(), atol=1e-6), key
