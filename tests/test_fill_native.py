"""``kinecast fill`` writes the recording at its own quality: recorded frames kept, filled ones native.

Outside references:
- SHA-256 (FIPS 180-4, through hashlib): recorded frames come back byte for byte.
- PNG (ISO/IEC 15948): a 16-bit sample's full scale is 65535, an 8-bit one's 255; frames are read
  back with OpenCV (``cv2.IMREAD_UNCHANGED`` keeps the file's own depth and channels).
- TIFF 6.0 through tifffile: a 16-bit stack is written and the output pages read back with it.
- OpenCV's ``cv2.resize`` (INTER_CUBIC to enlarge) is the reference for bringing a model-size
  prediction to the native size (for a non-square native frame, the picture rows of the letterboxed
  model frame: 96 x 80 → 32 x 27 model pixels, 32·80/96 = 26.7 rounded, centred from row 2).
- RFC 4180 for the CSV files.

The model is a tiny run trained for a few steps: quality is not what these tests check.
"""

from __future__ import annotations

import csv
import hashlib
import os
from pathlib import Path

import cv2
import numpy as np
import pytest
import tifffile

from kinecast import config as C
from kinecast.cli import main
from kinecast.forecast import core
from kinecast.forecast import native
from kinecast.frames import read_recording
from kinecast.rigs import write_rig
from kinecast.train import fit, load_run

SIZE = 32                              # model frame size of the tiny run
NATIVE_W, NATIVE_H = 96, 80            # a larger, non-square native frame (enlarged 3x / 2.5x)
DELETED = ("frame_0010.png", "frame_0011.png", "frame_0020.png")
TINY = ["data.size=32", "model.latent_dim=4", "model.enc_channels=8", "model.dec_channels=8",
        "model.hidden=16", "train.batch=2", "train.val_every=2", "train.checkpoint_every=2",
        "train.window_start=6", "train.threads=1", "train.warmup_steps=1", "train.budget=0",
        "train.steps=4"]


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """A tiny grey run on the pendulum rig."""
    base = tmp_path_factory.mktemp("fill_native")
    write_rig("pendulum", base / "rig", trials=2, frames=20, seed=3, size=SIZE, fps=20.0, channels="grey")
    import torch
    threads = torch.get_num_threads()
    try:
        fit([base / "rig"], base / "run", C.apply_overrides(C.Config(), TINY), show_progress=False)
    finally:
        torch.set_num_threads(threads)
    return base / "run"


def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def drop_frames(folder: Path, names=DELETED) -> None:
    """Delete frame files and their timestamp rows: the camera 'dropped' them."""
    for name in names:
        (folder / name).unlink()
    csv_path = folder / "timestamps.csv"
    rows = [r for r in csv_path.read_text().splitlines() if r.split(",")[0] not in names]
    csv_path.write_text("\n".join(rows) + "\n")


def rig_recording(root: Path, channels: str, seed: int = 1, look: str = "classic") -> Path:
    write_rig("pendulum", root, trials=1, frames=30, seed=seed, size=SIZE, fps=30.0, channels=channels,
              look=look)
    return root / "trial_000"


def to_16bit_large(folder: Path) -> None:
    """Rewrite every frame as a 16-bit PNG at NATIVE_W x NATIVE_H (as a lab camera might deliver)."""
    for path in folder.glob("frame_*.png"):
        img = cv2.imread(str(path), cv2.IMREAD_UNCHANGED)
        big = cv2.resize(img, (NATIVE_W, NATIVE_H), interpolation=cv2.INTER_CUBIC)
        assert cv2.imwrite(str(path), big.astype(np.uint16) * 257)   # 255 * 257 = 65535


def read_marks(out: Path) -> dict[str, str]:
    with open(out / "filled.csv", newline="") as fh:
        return {r["frame"]: r["origin"] for r in csv.DictReader(fh)}


def fill(run_dir: Path, rec: Path, out: Path, capsys) -> str:
    assert main(["fill", str(run_dir), str(rec), "--out", str(out)]) == 0
    return capsys.readouterr().out


def test_16bit_colour_frames_come_back_at_their_own_quality(run, tmp_path, capsys):
    rec = rig_recording(tmp_path / "rig", "rgb")
    to_16bit_large(rec)
    drop_frames(rec)
    before = {p.name: sha256(p) for p in rec.glob("frame_*.png")}
    out = tmp_path / "filled"
    said = fill(run, rec, out, capsys)

    # every recorded frame: byte for byte the same file (SHA-256), under its own name
    written = {p.name for p in out.glob("frame_*.png")}
    assert written == set(before) | set(DELETED)
    for name, digest in before.items():
        assert sha256(out / name) == digest, name
    # the missing slots are named after the folder's own numbering and are 16-bit RGB at native size
    for name in DELETED:
        img = cv2.imread(str(out / name), cv2.IMREAD_UNCHANGED)
        assert img.shape == (NATIVE_H, NATIVE_W, 3) and img.dtype == np.uint16, (name, img.shape, img.dtype)
        assert img.max() > 255          # uses the 16-bit range, not 8-bit values in a 16-bit file
    # filled.csv marks exactly the dropped slots; the folder reads back as the complete recording
    marks = read_marks(out)
    assert {n for n, o in marks.items() if o == "predicted"} == set(DELETED)
    assert {n for n, o in marks.items() if o == "recorded"} == set(before)
    back = read_recording(out, C.Config().data)
    assert back.n_frames == 30 and not back.missing.any()
    assert back.info["dtype"] == "uint16" and back.info["source_size"] == [NATIVE_W, NATIVE_H]
    # the recorded frames keep their times exactly (timestamps.csv of the input, as floats)
    with open(rec / "timestamps.csv", newline="") as fh:
        t_in = {r["frame"]: float(r["time_s"]) for r in csv.DictReader(fh)}
    with open(out / "timestamps.csv", newline="") as fh:
        t_out = {r["frame"]: float(r["time_s"]) for r in csv.DictReader(fh)}
    assert all(t_out[n] == t for n, t in t_in.items())
    # one line says how colour was made from the grey model, and the size written
    assert sum("colour:" in line for line in said.splitlines()) == 1
    assert f"{NATIVE_W}x{NATIVE_H} 16-bit RGB" in said and "not measurements" in said


def test_grey_filled_frame_is_the_prediction_resized_by_opencv(run, tmp_path, capsys):
    """Grey model, grey 16-bit frames: a filled frame is the model-size prediction's picture rows
    brought to the native size by cv2.resize (INTER_CUBIC, enlarging), clipped to [0, 1], times
    65535 (PNG 16-bit)."""
    rec = rig_recording(tmp_path / "rig", "grey", seed=2)
    to_16bit_large(rec)
    drop_frames(rec)
    out = tmp_path / "filled"
    said = fill(run, rec, out, capsys)
    assert "colour:" not in said
    model, cfg = load_run(run)
    frames, filled = core.fill(model, cfg, read_recording(rec, cfg.data))
    names = read_marks(out)
    slots = [i for i, n in enumerate(names) if n in DELETED]
    assert list(np.flatnonzero(filled)) == slots
    for slot, name in zip(slots, DELETED):
        picture = frames[slot, 0][2:2 + 27]            # the padded rows above and below cut away
        want = np.rint(np.clip(cv2.resize(picture, (NATIVE_W, NATIVE_H),
                                          interpolation=cv2.INTER_CUBIC), 0, 1) * 65535)
        got = cv2.imread(str(out / name), cv2.IMREAD_UNCHANGED)
        assert got.shape == (NATIVE_H, NATIVE_W) and got.dtype == np.uint16
        # float32 arithmetic may round the last 16-bit step differently
        assert np.abs(got.astype(np.int64) - want.astype(np.int64)).max() <= 1


def test_8bit_rgb_fill_keeps_the_background_colour(run, tmp_path, capsys):
    """Grey model on 8-bit colour frames at the model's own size: the predicted grey change is added
    equally to R, G and B, so away from the object (where the prediction is the background) the
    filled frame keeps the recording's colour: R−G and G−B as in the recorded frames' median. (The
    textured look has a coloured background: R−G is about 20 levels, so grey frames would fail.)"""
    rec = rig_recording(tmp_path / "rig", "rgb", seed=4, look="textured")
    drop_frames(rec)
    recorded = np.stack([cv2.imread(str(p), cv2.IMREAD_UNCHANGED)[..., ::-1].astype(np.int64)
                         for p in sorted(rec.glob("frame_*.png"))])
    median = np.median(recorded, axis=0)
    out = tmp_path / "filled"
    fill(run, rec, out, capsys)
    for name in DELETED:
        img = cv2.imread(str(out / name), cv2.IMREAD_UNCHANGED)
        assert img.shape == (SIZE, SIZE, 3) and img.dtype == np.uint8
        rgb = img[..., ::-1].astype(np.int64)
        unclipped = (rgb > 0).all(axis=2) & (rgb < 255).all(axis=2)
        for a, b in ((0, 1), (1, 2)):
            diff = np.abs((rgb[..., a] - rgb[..., b]) - (median[..., a] - median[..., b]))[unclipped]
            # rounding to 8 bits twice: at most 2 steps apart, and only where the median differs
            # from the median of the 15 sampled frames (near the swing); most pixels agree exactly
            assert np.mean(diff <= 2) > 0.95, name


def test_no_gaps_writes_nothing(run, tmp_path, capsys):
    rec = rig_recording(tmp_path / "rig", "grey")
    out = tmp_path / "filled"
    said = fill(run, rec, out, capsys)
    assert said.startswith("nothing to fill") and len(said.splitlines()) == 1
    assert not out.exists()


def test_tiff_stack_becomes_a_folder_of_frames_by_slot(run, tmp_path, capsys):
    """A 16-bit TIFF stack with a gap in its timestamps: the output is a folder of single-page TIFFs
    named by slot; recorded pages come back pixel for pixel, the filled one at the stack's format."""
    rng = np.random.default_rng(0)
    pages = rng.integers(0, 65535, size=(12, 40, 48), dtype=np.uint16)
    stack = tmp_path / "stack.tif"
    tifffile.imwrite(stack, pages, photometric="minisblack")
    times = [i / 20 for i in range(13) if i != 5]                  # slot 5 dropped
    (tmp_path / "stack.csv").write_text("".join(f"{t!r}\n" for t in times))
    out = tmp_path / "filled"
    said = fill(run, stack, out, capsys)
    names = sorted(p.name for p in out.glob("frame_*.tif"))
    assert names == [f"frame_{i:04d}.tif" for i in range(13)]
    for k, slot in enumerate(i for i in range(13) if i != 5):
        np.testing.assert_array_equal(tifffile.imread(out / names[slot]), pages[k])
    new = tifffile.imread(out / "frame_0005.tif")
    assert new.shape == (40, 48) and new.dtype == np.uint16
    assert [o for o in read_marks(out).values()].count("predicted") == 1
    assert read_marks(out)["frame_0005.tif"] == "predicted"
    assert "TIFF stack" in said


def test_recorded_frames_are_copied_where_links_fail(run, tmp_path, capsys, monkeypatch):
    """Where hard links are refused (another file system: EXDEV), the frames are copied instead."""
    rec = rig_recording(tmp_path / "rig", "grey")
    drop_frames(rec, DELETED[:1])

    def refuse(src, dst, *a, **k):
        raise OSError(18, "Invalid cross-device link")     # EXDEV (POSIX)

    monkeypatch.setattr(native.os, "link", refuse)
    out = tmp_path / "filled"
    said = fill(run, rec, out, capsys)
    assert "byte-for-byte copies" in said and "hard links" not in said
    for p in rec.glob("frame_*.png"):
        assert sha256(out / p.name) == sha256(p)
        assert os.stat(out / p.name).st_ino != os.stat(p).st_ino


@pytest.mark.parametrize("names, k, want", [
    (("frame_0007.png", "frame_0010.png"), 2, ["frame_0008.png", "frame_0009.png"]),
    (("f9.png", "f12.png"), 2, ["f10.png", "f11.png"]),
    (("img_0100_cam1.tif", "img_0106_cam1.tif"), 2, ["img_0102_cam1.tif", "img_0104_cam1.tif"]),
    (("shot_0004.png", "shot_0005.png"), 1, ["shot_0004_fill1.png"]),    # no number free between
])
def test_missing_slots_follow_the_folders_numbering(names, k, want):
    got = native._gap_names(*names, k)
    assert got == want
    from kinecast.frames.images import natural_key
    full = [names[0], *got, names[1]]
    assert sorted(full, key=natural_key) == full      # they read back in time order
