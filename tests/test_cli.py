"""apg-train end to end: Hydra composition, errors that name the bad key, run directories, TensorBoard."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from hydra import compose, initialize_config_dir

from apg import config as app_config
from apg.cli.train import CONFIG_DIR
from apg.monitor import TAGS

TINY = ["train.iterations=2", "train.batch_size=8", "train.horizon=10", "train.eval_every=1", "train.eval_batch=16",
        "train.figure_every=2", "progress=false"]
EXPERIMENTS = sorted(p.stem for p in (Path(CONFIG_DIR) / "experiment").glob("*.yaml"))


def apg_train(*args: str, cwd: Path) -> subprocess.CompletedProcess:
    env = {**os.environ, "HYDRA_FULL_ERROR": "0"}
    return subprocess.run([sys.executable, "-m", "apg.cli.train", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=300)


def test_train_writes_the_documented_run_directory(tmp_path):
    run = tmp_path / "run"
    out = apg_train(*TINY, f"hydra.run.dir={run}", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    for name in ("checkpoint.pt", "config.yaml", "metrics.json", "train.log"):
        assert (run / name).exists(), name
    metrics = json.loads((run / "metrics.json").read_text())
    assert metrics["system"] == "pendulum" and metrics["iterations"] == 2

    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    events = EventAccumulator(str(run))
    events.Reload()
    scalars = set(events.Tags()["scalars"])
    expected = {TAGS[k] for k in ("cost", "grad_norm", "learning_rate", "iteration_seconds", "sim_steps_per_second",
                                  "eval_cost", "success_rate")}
    assert expected <= scalars
    assert TAGS["figure"] in events.Tags()["images"]
    assert [e.step for e in events.Scalars(TAGS["eval_cost"])] == [0, 1, 2]
    assert (run / "hparams").is_dir()  # hyperparameters with the final metrics


def test_existing_run_directory_is_refused(tmp_path):
    run = tmp_path / "run"
    assert apg_train(*TINY, f"hydra.run.dir={run}", cwd=tmp_path).returncode == 0
    before = (run / "checkpoint.pt").read_bytes()
    out = apg_train(*TINY, f"hydra.run.dir={run}", cwd=tmp_path)
    assert out.returncode != 0 and "resume=true" in out.stderr
    assert (run / "checkpoint.pt").read_bytes() == before
    out = apg_train(*TINY[1:], "train.iterations=3", "resume=true", f"hydra.run.dir={run}", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    assert json.loads((run / "metrics.json").read_text())["iterations"] == 3


@pytest.mark.parametrize("override, named", [
    ("system.params.mass=abc", "system.params.mass"),  # wrong type
    ("system.params.foo=1", "system.params.foo"),  # unknown key
    ("train.batch_size=1.5", "train.batch_size"),
    ("system=pendulm", "Available options in 'system'"),  # unknown system lists the valid ones
    ("system.params.mass=-1", "params.mass must be > 0"),  # out of range, checked by the record
    ("system.dt=-0.1", "dt must be a positive number"),
    ("optim.name=adagrad", "optim.name must be one of adam, sgd"),
])
def test_bad_config_stops_with_a_message_naming_the_key(tmp_path, override, named):
    out = apg_train(*TINY, override, f"hydra.run.dir={tmp_path / 'run'}", cwd=tmp_path)
    assert out.returncode != 0
    assert named in out.stderr + out.stdout
    assert not (tmp_path / "run" / "checkpoint.pt").exists()


def test_multirun_over_seeds(tmp_path):
    out = apg_train("--multirun", "seed=0,1", *TINY, f"hydra.sweep.dir={tmp_path / 'sweep'}", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    metrics = sorted((tmp_path / "sweep").glob("*/metrics.json"))
    assert [json.loads(m.read_text())["seed"] for m in metrics] == [0, 1]


@pytest.mark.parametrize("experiment", EXPERIMENTS)
def test_experiment_configs_compose_into_valid_records(experiment):
    with initialize_config_dir(config_dir=CONFIG_DIR, version_base="1.3"):
        cfg = compose(config_name="train", overrides=[f"+experiment={experiment}"])
    spec = app_config.build(cfg)
    assert spec.config["experiment"] == experiment
    assert spec.train.iterations >= 1


def test_every_system_option_composes():
    options = sorted(p.stem for p in (Path(CONFIG_DIR) / "system").glob("*.yaml"))
    assert len(options) >= 7
    for option in options:
        with initialize_config_dir(config_dir=CONFIG_DIR, version_base="1.3"):
            spec = app_config.build(compose(config_name="train", overrides=[f"system={option}"]))
        assert spec.system.dt > 0


def test_help_names_the_command_and_only_its_own_choices(tmp_path):
    out = apg_train("--help", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    text = out.stdout
    assert text.startswith("apg-train:") and "powered by Hydra" not in text
    for name in EXPERIMENTS:
        assert name in text, name  # e.g. hollowmere_arm_upright, offered as +experiment=NAME
    for group in ("system", "policy", "optim", "estimator"):
        for option in (Path(CONFIG_DIR) / group).glob("*.yaml"):
            assert option.stem in text, (group, option.stem)
    # Hydra's stored schemas are not choices, and apg-compare's presets are not apg-train's.
    assert "schema_" not in text and "schema," not in text
    compare_presets = [p.stem for p in Path(CONFIG_DIR).rglob("compare/*.yaml")]
    assert compare_presets, "the compare presets moved: point this test at them"
    for name in compare_presets:
        assert name not in text, name
