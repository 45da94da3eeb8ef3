"""The one config object: TOML round trip, overrides, validation messages.

Reference: TOML v1.0.0 (toml.io) — the file we write must parse with the standard library's
``tomllib`` (PEP 680) and give back the same values.
"""

import tomllib

import pytest

from kinecast import config as C
from kinecast.cli import main
from kinecast.errors import KinecastError


def test_defaults_round_trip_through_toml(tmp_path):
    cfg = C.Config()
    path = C.save(cfg, tmp_path / "config.toml")
    assert C.load(path) == cfg
    # The text is valid TOML for the standard library parser (TOML v1.0.0).
    tree = tomllib.loads(path.read_text())
    assert set(tree) == set(C.SECTIONS)


def test_changed_values_round_trip_exactly(tmp_path):
    cfg = C.apply_overrides(C.Config(), [
        "data.roi=[10, 20, 30, 40]", "data.color=rgb", "model.latent_dim=12",
        "solver.time_scale=3.3333333333333335", "train.budget=1h30m", "train.lr=0.000123456789",
        "score.holdout=trial:trial_007", 'data.cache_dir=/tmp/a "quoted" \\ dir',
    ])
    path = C.save(cfg, tmp_path / "c.toml")
    back = C.load(path)
    assert back == cfg
    assert back.solver.time_scale == 3.3333333333333335  # repr() of a float round-trips exactly
    assert back.data.cache_dir == '/tmp/a "quoted" \\ dir'


def test_partial_file_keeps_other_defaults(tmp_path):
    (tmp_path / "p.toml").write_text("[model]\nlatent_dim = 4\n")
    cfg = C.load(tmp_path / "p.toml")
    assert cfg.model.latent_dim == 4
    assert cfg.train == C.TrainConfig()


@pytest.mark.parametrize("override, words", [
    ("model.latent_dim=abc", ["model.latent_dim", "'abc'", "whole number"]),
    ("model.latent_dim=0", ["model.latent_dim", "from 1 to 256"]),
    ("model.variant=third_order", ["model.variant", "second_order", "first_order"]),
    ("model.nope=1", ["model.nope", "unknown key", "latent_dim"]),
    ("nosection.key=1", ["unknown section", "[nosection]"]),
    ("train.budget=5 fortnights", ["train.budget", "90s, 5m"]),
    ("train.background=1", ["train.background", "unknown key"]),
    ("data.roi=[1,2,3]", ["data.roi", "0 or 4 numbers"]),
    ("score.holdout=first:3", ["score.holdout", "last:N"]),
    ("model.background=yes", ["model.background", "true or false"]),
    ("justtext", ["section.key=value"]),
])
def test_validation_names_key_value_and_allowed(override, words):
    with pytest.raises(KinecastError) as info:
        C.apply_overrides(C.Config(), [override])
    for w in words:
        assert w in str(info.value)


def test_bad_toml_file_is_one_clear_error(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[model\nlatent_dim = ")
    with pytest.raises(KinecastError, match="not valid TOML"):
        C.load(bad)
    wrong_type = tmp_path / "wt.toml"
    wrong_type.write_text("[train]\nsteps = 'many'\n")
    with pytest.raises(KinecastError, match="train.steps"):
        C.load(wrong_type)


@pytest.mark.parametrize("text, seconds", [("90s", 90), ("5m", 300), ("1h30m", 5400), ("5 minutes", 300),
                                           ("0", 0), ("2.5m", 150)])
def test_budget_parser(text, seconds):
    assert C.parse_budget(text) == seconds


def test_cli_config_and_set_then_exit_2_on_bad_key(tmp_path, capsys):
    out = tmp_path / "c.toml"
    assert main(["config", "--set", "model.hidden=32", "--out", str(out)]) == 0
    assert C.load(out).model.hidden == 32
    before = out.read_bytes()
    # Refuses to overwrite an existing file; exit status 2, one line, file unchanged.
    assert main(["config", "--out", str(out)]) == 2
    assert out.read_bytes() == before
    capsys.readouterr()
    assert main(["config", "--config", str(out), "--set", "model.hidden=-1"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "model.hidden" in err[0] and "Traceback" not in err[0]


def test_field_per_keypoint_reads_old_true_false():
    # run folders written before the auto choice hold a TOML boolean (TOML 1.0.0: true / false)
    from kinecast.config import from_toml_text
    assert from_toml_text("[model]\nfield_per_keypoint = true\n").model.field_per_keypoint == "on"
    assert from_toml_text("[model]\nfield_per_keypoint = false\n").model.field_per_keypoint == "off"
    assert from_toml_text('[model]\nfield_per_keypoint = "auto"\n').model.field_per_keypoint == "auto"


def test_a_saved_run_without_a_newer_key_reads_as_it_was_trained(tmp_path):
    # a run folder written before model.keypoint_window existed read its keypoints over the whole
    # heat map (window 0): loading its config.toml must give 0, whatever today's default; a run that
    # names the key keeps its own value (TOML 1.0.0 tables and integers)
    from kinecast import config as cfgmod
    old = tmp_path / "old.toml"
    old.write_text("[model]\nkeypoints = 2\n", encoding="utf-8")
    assert cfgmod.load(old, cfgmod.saved_run_base()).model.keypoint_window == 0
    assert cfgmod.load(old, cfgmod.saved_run_base()).model.field_per_keypoint == "off"
    # a run resumed from before train.weight_average kept its raw weights: it goes on without one
    assert cfgmod.load(old, cfgmod.saved_run_base()).train.weight_average == 0.0
    # and one from before the joint stage's warm-up resumes its joint stage as it began it
    old_train = cfgmod.load(old, cfgmod.saved_run_base()).train
    assert old_train.joint_warmup == 0.0 and old_train.joint_fresh_moments is False
    new = tmp_path / "new.toml"
    new.write_text("[model]\nkeypoint_window = 5\n", encoding="utf-8")
    assert cfgmod.load(new, cfgmod.saved_run_base()).model.keypoint_window == 5
    assert cfgmod.load(old).model.keypoint_window == cfgmod.Config().model.keypoint_window
