"""Safe loading: weights are safetensors, nothing is ever unpickled, damaged files are refused.

Sources:
* safetensors file layout (the format's published specification, huggingface/safetensors README,
  quoted from memory and checked against real files in test_run_files_are_safetensors_not_pickles):
  8 bytes little-endian unsigned header length N, then N bytes of JSON header (tensor names,
  dtypes, shapes, data offsets, and a ``__metadata__`` table of strings), then the raw tensor data.
  The format carries no checksum of its own, so kinecast writes a SHA-256 of the tensors into the
  metadata and checks it on load.
* ``torch.save`` files are zip archives (they start with the zip local-file signature, see
  ZIP_SIGNATURE) holding a pickle; unpickling can run arbitrary code (Python docs, ``pickle``
  module warning). Loading must therefore never reach ``pickle`` or ``torch.load``.
"""

from __future__ import annotations

import hashlib
import json
import pickle
import shutil
import struct
from pathlib import Path

import numpy as np
import pytest
import torch

from kinecast import config as C
from kinecast.cli import main
from kinecast.errors import KinecastError
from kinecast.rigs import write_rig
from kinecast import runfolder as rf
from kinecast.train import fit, load_run

TINY = ["data.size=32", "model.latent_dim=4", "model.enc_channels=8", "model.dec_channels=8",
        "model.hidden=16", "train.batch=2", "train.val_every=2", "train.checkpoint_every=2",
        "train.window_start=6", "train.threads=1", "train.warmup_steps=1", "train.budget=0",
        "train.steps=4"]
# PKWARE APPNOTE.TXT local file header signature 0x04034b50 (section 4.3.7, numbering from memory;
# the test below also sees it at the start of a real torch.save file)
ZIP_SIGNATURE = b"PK\x03\x04"


@pytest.fixture(scope="module")
def world(tmp_path_factory):
    base = tmp_path_factory.mktemp("safe_loading")
    rig = base / "rig"
    write_rig("pendulum", rig, trials=2, frames=20, seed=9, size=32, fps=20.0, channels="grey")
    threads = torch.get_num_threads()
    try:
        fit([rig], base / "run", C.apply_overrides(C.Config(), TINY), show_progress=False)
    finally:
        torch.set_num_threads(threads)
    return rig, base / "run"


def snapshot(*roots: Path) -> dict[str, str]:
    return {str(p): "<dir>" if p.is_dir() else hashlib.sha256(p.read_bytes()).hexdigest()
            for root in roots for p in sorted(root.rglob("*"))}


def header_of(path: Path) -> tuple[int, dict]:
    """(N, header) per the safetensors layout: u64 little-endian N, then N bytes of JSON."""
    data = path.read_bytes()
    (n,) = struct.unpack("<Q", data[:8])
    return n, json.loads(data[8:8 + n])


@pytest.fixture
def no_unpickling(monkeypatch):
    """Make every unpickling entry point fail loudly and record any attempt."""
    calls = []

    def trap(name):
        def refuse(*args, **kwargs):
            calls.append(name)
            raise AssertionError(f"{name} called while loading")
        return refuse

    for module, name in ((pickle, "load"), (pickle, "loads"), (pickle, "Unpickler"), (torch, "load")):
        monkeypatch.setattr(module, name, trap(f"{module.__name__}.{name}"))
    return calls


def test_the_trap_is_armed(no_unpickling, tmp_path):
    """The patched entry points really refuse (else the next test would prove nothing)."""
    blob = pickle.dumps({"a": 1})
    with pytest.raises(AssertionError):
        pickle.loads(blob)
    torch.save({"w": torch.zeros(2)}, tmp_path / "w.pt")
    assert (tmp_path / "w.pt").read_bytes()[:4] == ZIP_SIGNATURE
    with pytest.raises(AssertionError):
        torch.load(tmp_path / "w.pt")
    assert no_unpickling == ["pickle.loads", "torch.load"]


def test_run_files_are_safetensors_not_pickles(world):
    _, run = world
    for name in (rf.WEIGHTS, rf.RESUME):
        path = run / name
        n, header = header_of(path)
        assert path.read_bytes()[:4] != ZIP_SIGNATURE
        assert "__metadata__" in header and rf._META_KEY in header["__metadata__"]
        tensors = {k: v for k, v in header.items() if k != "__metadata__"}
        # every tensor's data range lies inside the file, after the header (safetensors layout)
        end = max(v["data_offsets"][1] for v in tensors.values())
        assert 8 + n + end == path.stat().st_size


def test_load_run_forecast_fill_and_resume_never_unpickle(world, tmp_path, no_unpickling, capsys):
    rig, run = world
    model, cfg = load_run(run)
    assert cfg.model.latent_dim == 4 and not model.training
    trial = rig / "trial_001"
    assert main(["forecast", str(run), str(trial), "--frames", "3", "--out", str(tmp_path / "c.gif")]) == 0
    assert (tmp_path / "c.gif").is_file() and (tmp_path / "c_forecast.npz").is_file()
    gappy = Path(shutil.copytree(trial, tmp_path / "gappy"))   # fill needs a dropped frame to fill
    (gappy / "frame_0010.png").unlink()
    stamps = gappy / "timestamps.csv"
    stamps.write_text("".join(ln for ln in stamps.read_text().splitlines(keepends=True)
                              if not ln.startswith("frame_0010.png,")))
    assert main(["fill", str(run), str(gappy), "--out", str(tmp_path / "filled")]) == 0
    assert len(list((tmp_path / "filled").glob("frame_*.png"))) == 20
    copy = Path(shutil.copytree(run, tmp_path / "run"))
    assert main(["fit", "--resume", str(copy), "--set", "train.steps=6", "--quiet"]) == 0
    assert rf.load_tensors(copy / rf.RESUME)[1]["step"] == 6
    assert no_unpickling == []


def flip(data: bytearray, at: int) -> bytearray:
    data[at] ^= 0xFF
    return data


def _data_start(data: bytes) -> int:
    return 8 + struct.unpack("<Q", data[:8])[0]


def _rename_a_tensor(data: bytearray) -> bytearray:
    """Change one letter of a tensor name inside the header (same length, valid JSON)."""
    at = data.index(b'"pos_enc.', 8) + 1
    data[at] = ord("q")
    return data


# name -> (damage(bytes) -> bytes, expected problem)
DAMAGE = {
    "header JSON byte flipped": (lambda d: flip(d, 8), "damaged or not a kinecast safetensors file"),
    "header length flipped": (lambda d: flip(d, 5), "damaged or not a kinecast safetensors file"),
    "tensor data byte flipped": (lambda d: flip(d, (_data_start(d) + len(d)) // 2),
                                 "does not match the checksum"),
    "last data byte flipped": (lambda d: flip(d, len(d) - 1), "does not match the checksum"),
    "tensor renamed in the header": (_rename_a_tensor, "does not match the checksum"),
    "truncated to 60%": (lambda d: d[: len(d) * 6 // 10], "damaged or not a kinecast safetensors file"),
    "emptied (0 bytes)": (lambda d: bytearray(), "damaged or not a kinecast safetensors file"),
}


@pytest.mark.parametrize("kind", list(DAMAGE))
def test_damaged_weights_are_refused_with_one_line(world, tmp_path, capsys, kind):
    rig, run = world
    damage, problem = DAMAGE[kind]
    copy = Path(shutil.copytree(run, tmp_path / "run"))
    weights = copy / rf.WEIGHTS
    weights.write_bytes(bytes(damage(bytearray(weights.read_bytes()))))
    with pytest.raises(KinecastError, match=problem):
        load_run(copy)
    before = snapshot(tmp_path, run)
    capsys.readouterr()
    assert main(["forecast", str(copy), str(rig / "trial_001"), "--out", str(tmp_path / "c.mp4")]) == 2
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1 and err[0].startswith("kinecast: error:"), err
    assert rf.WEIGHTS in err[0] and problem in err[0], err[0]
    assert snapshot(tmp_path, run) == before


@pytest.mark.parametrize("kind", ["tensor data byte flipped", "truncated to 60%"])
def test_damaged_resume_checkpoint_is_refused_with_one_line(world, tmp_path, capsys, kind):
    _, run = world
    damage, problem = DAMAGE[kind]
    copy = Path(shutil.copytree(run, tmp_path / "run"))
    resume = copy / rf.RESUME
    resume.write_bytes(bytes(damage(bytearray(resume.read_bytes()))))
    before = snapshot(copy)
    capsys.readouterr()
    assert main(["fit", "--resume", str(copy), "--set", "train.steps=6", "--quiet"]) == 2
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1 and rf.RESUME in err[0] and problem in err[0], err
    assert snapshot(copy) == before


def test_a_foreign_safetensors_file_is_not_taken_for_a_checkpoint(world, tmp_path, capsys):
    """A valid safetensors file that kinecast did not write: refused by name, not half-used."""
    from safetensors.torch import save_file

    _, run = world
    copy = Path(shutil.copytree(run, tmp_path / "run"))
    save_file({"x": torch.from_numpy(np.arange(3, dtype=np.float32))}, str(copy / rf.RESUME))
    save_file({"x": torch.zeros(3)}, str(copy / rf.WEIGHTS))
    capsys.readouterr()
    assert main(["fit", "--resume", str(copy), "--quiet"]) == 2
    assert main(["report", str(copy), "--out", str(tmp_path / "r.html")]) == 0  # needs no weights
    assert main(["forecast", str(copy), str(world[0] / "trial_001"), "--out", str(tmp_path / "c.mp4")]) == 2
    err = capsys.readouterr().err.splitlines()
    assert "not a kinecast resume checkpoint" in err[0] and rf.RESUME in err[0]
    assert "do not match the run's config.toml" in err[-1] and rf.WEIGHTS in err[-1]


def test_weights_of_an_older_network_layout_are_refused(world, tmp_path, capsys):
    """Same tensor names and shapes, but written for another layout (e.g. the ELU networks before
    layout 2): refused by name instead of silently computing something else."""
    rig, run = world
    copy = Path(shutil.copytree(run, tmp_path / "run"))
    tensors, meta = rf.load_tensors(copy / rf.WEIGHTS)
    from safetensors.torch import save_file

    meta.pop("layout")  # what files written before the layout key looked like (layout 1)
    save_file({k: v.contiguous() for k, v in tensors.items()}, str(copy / rf.WEIGHTS),
              metadata={"kinecast": json.dumps(meta)})
    with pytest.raises(KinecastError, match="layout 1"):
        load_run(copy)
    capsys.readouterr()
    assert main(["forecast", str(copy), str(rig / "trial_001"), "--out", str(tmp_path / "c.mp4")]) == 2
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1 and "train the run again" in err[0], err
    assert not (tmp_path / "c.mp4").exists()
