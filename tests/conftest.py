"""Suite-wide fixtures: keep the frame cache and matplotlib out of the user's home folder; one small
trained run shared (read-only) by the score and report tests."""

import os

import matplotlib
import pytest

matplotlib.use("Agg")


@pytest.fixture(autouse=True, scope="session")
def _private_cache(tmp_path_factory):
    old = os.environ.get("KINECAST_CACHE_DIR")
    os.environ["KINECAST_CACHE_DIR"] = str(tmp_path_factory.mktemp("kinecast_cache"))
    yield
    if old is None:
        os.environ.pop("KINECAST_CACHE_DIR", None)
    else:
        os.environ["KINECAST_CACHE_DIR"] = old


@pytest.fixture(scope="session")
def small_pendulum_run(tmp_path_factory):
    """A pendulum rig (2 trials × 40 frames, 32 px) in ``root / "rig"`` and a 6-step fit on it in
    ``root / "run"``: tests read them and write their own outputs elsewhere."""
    from kinecast import config as C
    from kinecast.rigs import write_rig
    from kinecast.train import fit

    root = tmp_path_factory.mktemp("small_run")
    write_rig("pendulum", root / "rig", trials=2, frames=40, seed=1, size=32, fps=20.0)
    cfg = C.apply_overrides(C.Config(), [
        "data.size=32", "model.latent_dim=4", "model.enc_channels=8", "model.dec_channels=8",
        "model.hidden=16", "train.batch=2", "train.val_every=5", "train.steps=6", "train.budget=0",
        "train.threads=1", "train.window_start=6"])
    fit([root / "rig"], root / "run", cfg, show_progress=False)
    return root
