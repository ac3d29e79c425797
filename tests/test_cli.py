"""apg-train from its config: Hydra composition, errors that name the bad key, run directories, TensorBoard.

Most tests call the entry's ``run()`` (or ``apg.cli.config.build_train``) on a config composed with ``hydra.compose``, in
this process; a subprocess adds only the interpreter's start and Hydra's logging set-up, which the one
subprocess test per entry point here checks (exit code, the error on stderr). apg-export, apg-eval and
apg-compare have theirs next to their library tests (tests/test_export.py, test_eval.py, test_compare.py).
"""

from __future__ import annotations

import dataclasses
import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Any, Iterator

import pytest
import yaml
from hydra import compose, initialize_config_dir
from hydra.core.hydra_config import HydraConfig
from omegaconf import OmegaConf, open_dict

import envs
from apg.cli import config as app_config
from apg.cli import train as train_cli
from apg.cli.train import CONFIG_DIR
from apg.monitor import TAGS
from apg.runs import RunExistsError

TINY = ["train.iterations=2", "train.batch_size=8", "train.horizon=10", "train.eval_every=1", "train.eval_batch=16",
        "train.figure_every=2", "progress=false"]
EXPERIMENTS = sorted(p.stem for p in (Path(CONFIG_DIR) / "experiment").glob("*.yaml"))
SYSTEM_OPTIONS = sorted(p.stem for p in (Path(CONFIG_DIR) / "system").glob("*.yaml"))


@pytest.fixture(autouse=True)
def _no_hydra_state_left_behind() -> Iterator[None]:
    yield
    HydraConfig.instance().cfg = None  # what composed(run_dir=...) set, so later tests start as Hydra would


def composed(*overrides: str, run_dir: Path | None = None):
    """apg-train's config as Hydra composes it; with ``run_dir``, also Hydra's runtime state that ``run`` reads
    (what ``@hydra.main`` sets up before calling the task function)."""
    with initialize_config_dir(config_dir=CONFIG_DIR, version_base="1.3"):
        cfg = compose(config_name="train", overrides=list(overrides), return_hydra_config=run_dir is not None)
    if run_dir is not None:
        with open_dict(cfg):
            cfg.hydra.runtime.output_dir = str(run_dir)
        HydraConfig.instance().set_config(cfg)
        with open_dict(cfg):
            del cfg["hydra"]
    return cfg


def train_in_process(run_dir: Path, *overrides: str) -> dict:
    return train_cli.run(composed(*TINY, *overrides, run_dir=run_dir))


def subprocess_entry(module: str, *args: str, cwd: Path) -> subprocess.CompletedProcess:
    env = {**os.environ, "HYDRA_FULL_ERROR": "0", "OMP_NUM_THREADS": "1"}
    return subprocess.run([sys.executable, "-m", module, *args], cwd=cwd, env=env, capture_output=True, text=True,
                          timeout=300)


def test_train_writes_the_documented_run_directory(tmp_path):
    run = tmp_path / "run"
    given = ["seed=3", "optim.lr=0.002", "system.params.mass=1.25", "train.horizon=12"]
    train_in_process(run, *given)
    for name in ("checkpoint.pt", "config.yaml", "metrics.json"):
        assert (run / name).exists(), name
    # The values given on the command line are the ones the run records and used.
    saved = yaml.safe_load((run / "config.yaml").read_text())
    assert (saved["seed"], saved["optim"]["lr"], saved["system"]["params"]["mass"], saved["train"]["horizon"]) == (
        3, 0.002, 1.25, 12)
    metrics = json.loads((run / "metrics.json").read_text())
    assert (metrics["system"], metrics["seed"], metrics["iterations"]) == ("pendulum", 3, 2)

    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    events = EventAccumulator(str(run))
    events.Reload()
    scalars = set(events.Tags()["scalars"])
    expected = {TAGS[k] for k in ("cost", "grad_norm", "learning_rate", "iteration_seconds", "sim_steps_per_second",
                                  "eval_cost", "success_rate")}
    assert expected <= scalars
    assert TAGS["figure"] in events.Tags()["images"]
    assert [e.step for e in events.Scalars(TAGS["eval_cost"])] == [0, 1, 2]
    assert [e.value for e in events.Scalars(TAGS["learning_rate"])][0] == pytest.approx(0.002)  # cosine starts at lr
    assert (run / "hparams").is_dir()  # hyperparameters with the final metrics


def test_existing_run_directory_is_refused_and_resume_continues(tmp_path):
    run = tmp_path / "run"
    train_in_process(run)
    before = (run / "checkpoint.pt").read_bytes()
    with pytest.raises(RunExistsError, match="resume=true"):
        train_in_process(run)
    assert (run / "checkpoint.pt").read_bytes() == before
    with pytest.warns(UserWarning, match="iterations"):
        metrics = train_in_process(run, "train.iterations=3", "resume=true")
    assert metrics["iterations"] == 3
    assert json.loads((run / "metrics.json").read_text())["iterations"] == 3


@pytest.mark.parametrize("override, named", [
    ("system.params.mass=abc", "system.params.mass"),  # wrong type
    ("system.params.foo=1", "system.params.foo"),  # unknown key
    ("train.batch_size=1.5", "train.batch_size"),
    ("system=pendulm", "Available options in 'system'"),  # unknown system lists the valid ones
])
def test_config_hydra_rejects_names_the_key(override, named):
    with pytest.raises(Exception, match=named):  # Hydra's own check, before any of ours runs
        composed(*TINY, override)


@pytest.mark.parametrize("override, message", [
    ("system.params.mass=-1", "system: params.mass must be > 0 kg, got -1"),  # the record's bound, with its unit
    ("system.dt=-0.1", "dt must be a positive number of seconds, got -0.1"),
    ("optim.name=adagrad", "optim.name must be one of adam, sgd; got 'adagrad'"),
    ("+system.ensemble.mass=[2,1]", "system.ensemble.mass must be [low, high] with low <= high"),
])
def test_out_of_range_value_stops_the_run_before_it_writes(tmp_path, override, message):
    run = tmp_path / "run"
    with pytest.raises(ValueError) as e:
        train_in_process(run, override)
    assert message in str(e.value)
    assert not (run / "checkpoint.pt").exists()


def test_train_subprocess_exits_2_with_the_error_on_stderr_and_in_the_log(tmp_path):
    run = tmp_path / "run"
    out = subprocess_entry("apg.cli.train", *TINY, "system.params.mass=-1", f"hydra.run.dir={run}", cwd=tmp_path)
    assert out.returncode == 2, out.stderr
    assert "params.mass must be > 0 kg, got -1" in out.stderr
    assert "params.mass must be > 0 kg, got -1" in (run / "train.log").read_text()  # Hydra's file handler
    assert not (run / "checkpoint.pt").exists()


def test_aggregate_subprocess_exits_2_with_the_error_on_stderr(tmp_path):
    out = subprocess_entry("apg.cli.aggregate", str(tmp_path), cwd=tmp_path)
    assert out.returncode == 2
    assert "holds no job directory" in out.stderr and out.stdout == ""


# ---- every value a YAML file sets arrives in the records -----------------------------------------------------------
def _leaves(node: dict, prefix: tuple[str, ...] = ()) -> Iterator[tuple[tuple[str, ...], Any]]:
    for key, value in node.items():
        if isinstance(value, dict):
            yield from _leaves(value, prefix + (key,))
        else:
            yield prefix + (key,), value


def _built(spec: app_config.TrainSpec, path: tuple[str, ...]) -> Any:
    """The value at a config path, read back from the built records (not from the config)."""
    head, *rest = path
    record = spec.record
    if head == "system" and rest[0] == "ensemble":
        return list(record.system.ensemble[rest[1]])
    obj: Any = {"system": spec.system, "estimator": record.update}.get(head) or getattr(record, head)
    for key in rest:
        obj = getattr(obj, key)
    return list(obj) if isinstance(obj, tuple) else obj


@pytest.mark.parametrize("experiment", EXPERIMENTS)
def test_experiment_values_arrive_in_the_records(experiment):
    raw = OmegaConf.to_container(OmegaConf.load(Path(CONFIG_DIR) / "experiment" / f"{experiment}.yaml"))
    spec = app_config.build_train(composed(f"+experiment={experiment}"))
    assert spec.record.experiment == experiment == raw["experiment"]
    option = next((d["override /system"] for d in raw.get("defaults", []) if isinstance(d, dict)
                   and "override /system" in d), "pendulum")
    assert spec.system.name == OmegaConf.load(Path(CONFIG_DIR) / "system" / f"{option}.yaml").name
    values = [(path, value) for path, value in _leaves(raw) if path[0] not in ("defaults", "experiment")]
    assert values  # an experiment that sets nothing would check nothing
    for path, value in values:
        assert _built(spec, path) == value, ".".join(path)


@pytest.mark.parametrize("option", SYSTEM_OPTIONS)
def test_system_option_values_arrive_in_the_system(option):
    raw = OmegaConf.to_container(OmegaConf.load(Path(CONFIG_DIR) / "system" / f"{option}.yaml"))
    spec = app_config.build_train(composed(f"system={option}"))
    assert type(spec.system) is envs.SYSTEMS[raw["name"]]
    assert spec.system.dt == raw.get("dt", envs.SYSTEMS[raw["name"]].default_dt)
    for path, value in _leaves({k: raw[k] for k in ("params", "task") if k in raw}):
        assert _built(spec, ("system", *path)) == value, ".".join(path)
    # every field the YAML leaves out keeps the record's default
    for part in ("params", "task"):
        record = getattr(spec.system, part)
        default = type(record)()
        for f in dataclasses.fields(record):
            if f.name not in raw.get(part, {}):
                assert getattr(record, f.name) == getattr(default, f.name), f"{part}.{f.name}"


def test_help_names_the_command_and_only_its_own_choices(monkeypatch, capsys):
    # in this process: @hydra.main reads sys.argv, prints the help and exits 0 (subprocesses are tested above)
    from hydra.core.global_hydra import GlobalHydra

    monkeypatch.setattr(sys, "argv", ["apg-train", "--help"])
    try:
        with pytest.raises(SystemExit) as info:
            train_cli.main()
    finally:
        GlobalHydra.instance().clear()  # what the help left initialised, so later compositions start clean
    assert info.value.code in (0, None)
    text = capsys.readouterr().out
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


def test_bare_apg_train_is_the_default_preset():
    """The README promises that plain ``apg-train`` trains the hollowmere_arm_upright preset: the two compose to
    records that differ in nothing but the preset's name."""
    bare = app_config.build_train(composed()).record
    preset = app_config.build_train(composed("+experiment=hollowmere_arm_upright")).record
    assert bare.differences(preset) == [("experiment", None, "hollowmere_arm_upright")]
