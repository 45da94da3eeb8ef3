"""Repeatable numbers (``forecast.seed`` / ``--seed``) and scores that name the run they scored.

Outside references:
- A seeded pseudo-random generator repeats its stream (torch.Generator.manual_seed, PyTorch docs):
  the same command gives byte-identical files, another seed other draws. Baselines draw nothing and
  must not change with the seed.
- SHA-256 is FIPS 180-4; the digest written by ``score`` is checked against Python's hashlib, and the
  digest function against the standard's own example: SHA-256("abc") =
  ba7816bf 8f01cfea 414140de 5dae2223 b00361a3 96177a9c b410ff61 f20015ad (FIPS 180-4 / NIST
  example "SHA256.pdf"; written here from memory).
- JSON is RFC 8259; the per-frame CSV is RFC 4180.

The model is the shipped pendulum run when it loads, else a tiny run trained for 4 steps: forecast
quality is not what these tests check.
"""

from __future__ import annotations

import csv
import hashlib
import json
import re
import shutil
from pathlib import Path

import numpy as np
import pytest

from kinecast import config as C
from kinecast.cli import main
from kinecast.errors import KinecastError
from kinecast.score.report import RUN_DIGEST, weights_sha256
from kinecast import runfolder as rf
from kinecast.train import fit, load_run
from test_fill_native import TINY  # the 4-step tiny run's settings

SHIPPED = Path(__file__).resolve().parents[1] / "weights" / "pendulum"
SAMPLES = "3"      # more than one: the futures are drawn
HOLDOUT = "last:20"


def _score(run: Path, rec: Path, out: Path, *options: str) -> int:
    return main(["score", str(run), str(rec), "--holdout", HOLDOUT, "--samples", SAMPLES, *options,
                 "--out", str(out)])


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    """(run folder, a 40-frame pendulum recording, folder of scores: ``a``/``a_again`` seed 5, ``b`` seed 6)."""
    base = tmp_path_factory.mktemp("repeat")
    assert main(["rig", "pendulum", "--out", str(base / "rig"), "--trials", "1", "--frames", "40",
                 "--seed", "2"]) == 0
    rec = base / "rig" / "trial_000"
    try:
        load_run(SHIPPED)
        run = SHIPPED
    except (KinecastError, OSError):  # being regenerated, or an older layout: train a tiny run
        import torch
        threads = torch.get_num_threads()
        try:
            fit([base / "rig"], base / "run", C.apply_overrides(C.Config(), TINY), show_progress=False)
        finally:
            torch.set_num_threads(threads)
        run = base / "run"
    scores = base / "scores"
    assert _score(run, rec, scores / "a", "--seed", "5") == 0
    assert _score(run, rec, scores / "a_again", "--seed", "5") == 0
    assert _score(run, rec, scores / "b", "--set", "forecast.seed=6") == 0  # the config key, same thing
    return run, rec, scores


def _rows(folder: Path, method: str) -> list[dict]:
    with open(folder / "per_frame.csv", newline="") as fh:
        return [r for r in csv.DictReader(fh) if r["method"] == method]


def test_same_command_gives_byte_identical_scores(setup):
    _, _, scores = setup
    # summary.json holds no wall-clock time or date (checked below), so the whole file is compared
    for name in ("summary.json", "per_frame.csv"):
        assert (scores / "a" / name).read_bytes() == (scores / "a_again" / name).read_bytes(), name
    text = (scores / "a" / "summary.json").read_text()
    assert not re.search(r"\d{4}-\d{2}-\d{2}|\d{2}:\d{2}:\d{2}", text)  # ISO 8601 date or time of day
    assert json.loads(text)["seed"] == 5


def test_another_seed_draws_other_futures(setup):
    _, _, scores = setup
    a, b = json.loads((scores / "a" / "summary.json").read_text()), json.loads((scores / "b" / "summary.json").read_text())
    assert (a["seed"], b["seed"]) == (5, 6)
    assert [r["mse"] for r in _rows(scores / "a", "model")] != [r["mse"] for r in _rows(scores / "b", "model")]
    assert a["band_coverage_per_frame"] != b["band_coverage_per_frame"]
    for method in ("persistence", "flow_warp"):  # baselines draw nothing: the seed must not touch them
        assert _rows(scores / "a", method) == _rows(scores / "b", method), method
        assert a["methods"][method] == b["methods"][method], method


def test_forecast_samples_repeat_with_their_seed(setup, tmp_path):
    run, rec, _ = setup

    def samples(name: str, *options: str) -> np.ndarray:
        assert main(["forecast", str(run), str(rec), "--frames", "6", "--samples", SAMPLES, *options,
                     "--set", "forecast.upscale=1", "--out", str(tmp_path / f"{name}.gif")]) == 0
        return np.load(tmp_path / f"{name}_forecast.npz")["samples"]

    first, again = samples("a", "--seed", "5"), samples("b", "--set", "forecast.seed=5")
    other = samples("c", "--seed", "6")
    np.testing.assert_array_equal(first, again)
    assert not np.array_equal(first, other)
    assert not np.array_equal(first[0], first[1])  # the futures of one command differ from each other


def test_a_bad_seed_is_one_line_and_exit_2(setup, tmp_path, capsys):
    run, rec, _ = setup
    out = tmp_path / "scores"
    assert _score(run, rec, out, "--seed", "-1") == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "forecast.seed" in err[0] and "-1" in err[0]
    assert not out.exists()


def test_scores_name_the_run_and_its_weights(setup, tmp_path):
    run, _, scores = setup
    summary = json.loads((scores / "a" / "summary.json").read_text())
    assert summary["run"] == str(run.resolve())
    assert summary[RUN_DIGEST] == hashlib.sha256((run / rf.WEIGHTS).read_bytes()).hexdigest()
    (tmp_path / rf.WEIGHTS).write_bytes(b"abc")  # FIPS 180-4 example message
    assert weights_sha256(tmp_path) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


def _other_run(run: Path, where: Path) -> Path:
    """A copy of ``run`` whose weights differ (one tensor nudged; still a valid weights file)."""
    shutil.copytree(run, where)
    tensors, meta = rf.load_tensors(where / rf.WEIGHTS)
    name = sorted(tensors)[0]
    tensors[name] = tensors[name] + 1e-3
    meta.pop("layout", None)  # save_tensors writes it
    rf.save_tensors(where / rf.WEIGHTS, tensors, meta)
    return where


def test_report_refuses_scores_of_another_run(setup, tmp_path, capsys):
    run, _, scores = setup
    other = _other_run(run, tmp_path / "other_run")
    page = tmp_path / "report.html"
    page.write_text("<p>mine</p>\n")
    assert main(["report", str(other), "--scores", str(scores / "a"), "--out", str(page), "--overwrite"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert str(scores / "a") in err[0] and str(run.resolve()) in err[0] and str(other) in err[0]
    assert page.read_text() == "<p>mine</p>\n"  # nothing the user had is replaced
    # the same weights in another folder are the same run's: accepted
    same = shutil.copytree(run, tmp_path / "same_run")
    assert main(["report", str(same), "--scores", str(scores / "a"), "--out", str(page), "--overwrite"]) == 0
    assert "Forecast scores on trial_000" in page.read_text()


def test_report_refuses_scores_that_name_no_weights(setup, tmp_path, capsys):
    run, rec, scores = setup
    old = shutil.copytree(scores / "a", tmp_path / "old_scores")
    summary = json.loads((old / "summary.json").read_text())
    del summary[RUN_DIGEST]  # as written before scores named the weights
    (old / "summary.json").write_text(json.dumps(summary))
    assert main(["report", str(run), "--scores", str(old), "--out", str(tmp_path / "r.html")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and str(old) in err[0] and "digest" in err[0]
    assert not (tmp_path / "r.html").exists()
    # scores of two frame sources belong to no run: any report may show them
    pair = tmp_path / "pair"
    assert main(["score", "--pred", str(rec), "--truth", str(rec), "--out", str(pair)]) == 0
    assert main(["report", str(run), "--scores", str(pair), "--out", str(tmp_path / "r.html")]) == 0
