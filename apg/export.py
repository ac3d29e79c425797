"""Export a trained policy to ONNX, and prove at export time that the file behaves like the policy.

The exported graph is the whole deployed controller: raw observations ``(batch, obs_dim)`` float32 in,
actions ``(batch, action_dim)`` float32 out in the system's units, with the observation normaliser and the
tanh squashing into the action limits inside the graph. The batch dimension is dynamic and the opset is stated
(:data:`DEFAULT_OPSET`). The file's ``metadata_props`` carry everything a consumer needs without this tool
(:func:`describe`), and every export is verified twice before it is written (:func:`verify`):

* output parity: onnxruntime against the torch policy on held-out observations visited by closed-loop
  trajectories; the bound is on the action difference divided by the action's half-range, because float32
  resolution near a 15 kN force limit is about 1e-3 N while it is 1e-7 of the range everywhere;
* closed-loop parity: the ONNX file drives the simulator from held-out initial states and must reproduce the
  torch policy's total cost.

Both results are written to ``<name>.verification.json`` beside the ``.onnx``. A failed check raises
:class:`VerificationError` and leaves no ``.onnx`` behind.
"""

from __future__ import annotations

import contextlib
import copy
import dataclasses
import hashlib
import io
import json
import logging
import os
import tempfile
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Mapping

import numpy as np
import torch
from torch import Tensor, nn

import envs
from apg.checkpoint import CHECKPOINT_NAME, atomic_write_bytes, atomic_write_text
from apg.policies import Policy
from apg.rollout import Evaluation, evaluate
from apg.runs import LoadedRun, load_run
from envs.base import System, bounded, check_record

log = logging.getLogger(__name__)

DEFAULT_OPSET = 18
INPUT_NAME = "observation"
OUTPUT_NAME = "action"
FORMAT = "apg-onnx-policy/1"
PREFIX = "apg."
HARDWARE_CAUTION = (
    "This controller was trained in simulation only. Before it drives a real machine, validate it on that machine "
    "with torque, force and speed limits and an emergency stop in place, and follow the applicable machine-safety "
    "standards, local codes and licensed engineering practice.")


class VerificationError(RuntimeError):
    """The exported file does not reproduce the torch policy within the stated bounds."""


class PolicyFileError(ValueError):
    """A file is not a readable apg ONNX policy (corrupt, foreign, or lacking the metadata)."""


@dataclass(frozen=True)
class ExportSettings:
    """How to export and how hard to check; the top of ``configs/export.yaml`` fills this record."""

    opset: int = bounded(DEFAULT_OPSET, positive=True)  # ONNX default-domain opset the graph is written in
    observations: int = bounded(4096, positive=True)  # held-out observations for the output-parity check
    # largest |onnx - torch| / action half-range (dimensionless, float32)
    action_tolerance: float = bounded(1e-5, positive=True)
    rollouts: int = bounded(64, positive=True)  # held-out initial states for the closed-loop check
    horizon: int = bounded(0, nonnegative=True)  # closed-loop steps; 0: the training's evaluation horizon
    cost_rtol: float = bounded(1e-4, positive=True)  # largest relative difference of the mean closed-loop cost
    seed: int = 31_337  # seed of the check's initial states: shared with neither training nor its held-out set

    def __post_init__(self) -> None:
        check_record(self)
        if not 15 <= int(self.opset) <= 23:
            raise ValueError(f"opset must be between 15 and 23 (what torch's exporter writes and onnxruntime runs for "
                             f"these graphs), got {self.opset}")


@dataclass(frozen=True)
class ExportResult:
    onnx_path: Path
    report_path: Path
    report: dict[str, Any]


# ---- metadata ---------------------------------------------------------------------------------------------
def _plain(v: Any) -> Any:
    if isinstance(v, Tensor):
        return v.tolist()
    if isinstance(v, tuple):
        return [_plain(e) for e in v]
    return v


def _record_dict(record: object) -> dict[str, Any]:
    return {f.name: _plain(getattr(record, f.name)) for f in dataclasses.fields(record)}  # type: ignore[arg-type]


def _units(record: object) -> dict[str, str]:
    return {f.name: f.metadata.get("unit", "") for f in dataclasses.fields(record)}  # type: ignore[arg-type]


def observation_layout(system: System) -> list[dict[str, Any]]:
    """Each observation entry in order: its name, unit, the state entry it comes from and how it is encoded."""
    out: list[dict[str, Any]] = []
    for i, s in enumerate(system.state):
        encodings = (("sin", "1"), ("cos", "1")) if s.angle else (("identity", s.unit),)
        for enc, u in encodings:
            name = f"{enc}({s.name})" if s.angle else s.name
            out.append({"index": len(out), "name": name, "unit": u, "state": s.name, "state_index": i,
                        "state_unit": s.unit, "encoding": enc})
    return out


def describe(run: LoadedRun, opset: int) -> dict[str, str]:
    """The ``metadata_props`` of an exported policy (every value a string; JSON where structured), all of it
    from the run's record: the plant it names is the plant the run trained on."""
    system, record = run.system, run.record
    horizon = record.train.eval_steps
    meta = {
        "format": FORMAT,
        "system": system.name,
        "params": json.dumps(_record_dict(system.params)),
        "param_units": json.dumps(_units(system.params)),
        "task": json.dumps(_record_dict(system.task)),
        "dt": repr(system.dt),
        "dt_unit": "s",
        "integrator": system.integrator,
        "control": "zero-order hold: the action is held constant over each time step dt",
        "state": json.dumps([{"name": s.name, "unit": s.unit, "angle": s.angle} for s in system.state]),
        "observation": json.dumps(observation_layout(system)),
        "angle_encoding": "an angle state th is observed as the pair (sin(th), cos(th)), in that order",
        "action": json.dumps([{"index": i, "name": a.name, "unit": a.unit, "low": lo, "high": hi}
                              for i, (a, lo, hi) in enumerate(zip(system.action, system.action_low,
                                                                  system.action_high))]),
        "input": json.dumps({"name": INPUT_NAME, "dtype": "float32", "shape": ["batch", system.obs_dim]}),
        "output": json.dumps({"name": OUTPUT_NAME, "dtype": "float32", "shape": ["batch", system.action_dim]}),
        "success_criterion": system.success_criterion,
        "horizon": str(horizon),
        "record_digest": record.digest(),
        "training": json.dumps({"iteration": run.iteration, "seed": record.seed, "experiment": record.experiment,
                                "ensemble": _plain(dict(record.system.ensemble)), "method": record.method,
                                "policy": _record_dict(record.policy), "code_version": record.code_version},
                               default=str),
        "opset": str(opset),
        "exported_with": json.dumps({"torch": torch.__version__, "onnx_opset": opset}),
        "hardware_caution": HARDWARE_CAUTION,
    }
    return {PREFIX + k: v for k, v in meta.items()}


_JSON_KEYS = ("params", "param_units", "task", "state", "observation", "action", "input", "output", "training",
              "exported_with")


def read_metadata(path: Path | str) -> dict[str, Any]:
    """The apg metadata of an exported file, decoded (JSON fields parsed, ``dt`` and ``horizon`` as numbers).

    Raises:
        PolicyFileError: the file is missing, not ONNX, or not written by :func:`export`.
    """
    import onnx

    path = Path(path)
    if not path.is_file():
        raise PolicyFileError(f"no ONNX file at {path}")
    try:
        model = onnx.load(str(path), load_external_data=False)
    except Exception as e:  # protobuf raises DecodeError and friends for foreign bytes
        raise PolicyFileError(f"{path} is not a readable ONNX file ({type(e).__name__}: {e})") from None
    return _decode({p.key: p.value for p in model.metadata_props}, path)


def _decode(props: Mapping[str, str], path: Path | str) -> dict[str, Any]:
    if props.get(PREFIX + "format") != FORMAT:
        found = props.get(PREFIX + "format")
        raise PolicyFileError(f"{path} is not an apg policy export (metadata {PREFIX}format is {found!r}, expected "
                              f"{FORMAT!r}); export a run with apg-export")
    out: dict[str, Any] = {}
    for key, value in props.items():
        if not key.startswith(PREFIX):
            continue
        k = key[len(PREFIX):]
        try:
            out[k] = json.loads(value) if k in _JSON_KEYS else value
        except json.JSONDecodeError:
            raise PolicyFileError(f"{path}: metadata {key} is not valid JSON") from None
    out["dt"] = float(out["dt"])
    out["horizon"] = int(out.get("horizon", 0))
    out["opset"] = int(out.get("opset", 0))
    return out


def system_from_metadata(meta: Mapping[str, Any]) -> System:
    """Rebuild the nominal system an exported policy was trained for, from its metadata alone."""
    try:
        return envs.build(meta["system"], params=meta["params"], task=meta["task"], dt=meta["dt"],
                         integrator=meta.get("integrator", "rk4"))
    except (KeyError, ValueError) as e:
        raise PolicyFileError(f"the metadata does not describe a known system: {e}") from None


# ---- the exported file as a policy ------------------------------------------------------------------------
class OnnxPolicy(nn.Module):
    """An exported file as a policy: ``(B, obs_dim)`` observations of any float dtype in, actions out in the
    same dtype (computed in float32 by onnxruntime on the CPU)."""

    def __init__(self, model: Path | str | bytes) -> None:
        super().__init__()
        import onnxruntime as ort

        opts = ort.SessionOptions()
        opts.intra_op_num_threads = 1  # tiny graphs: one thread is fastest and shares the cores politely
        opts.inter_op_num_threads = 1
        try:
            self.session = ort.InferenceSession(model if isinstance(model, bytes) else str(model), opts,
                                                providers=["CPUExecutionProvider"])
        except Exception as e:
            where = "the exported model" if isinstance(model, bytes) else str(model)
            raise PolicyFileError(f"onnxruntime cannot load {where}: {e}") from None
        self.input_name = self.session.get_inputs()[0].name
        self.output_name = self.session.get_outputs()[0].name

    def forward(self, obs: Tensor) -> Tensor:
        x = obs.detach().to(torch.float32).cpu().numpy()
        (y,) = self.session.run([self.output_name], {self.input_name: x})
        return torch.from_numpy(np.asarray(y)).to(obs.dtype)


class Float32Policy(nn.Module):
    """A float32 copy of a policy that accepts and returns any float dtype (the deployed arithmetic)."""

    def __init__(self, policy: Policy) -> None:
        super().__init__()
        self.policy = copy.deepcopy(policy).to(torch.float32).eval()

    def forward(self, obs: Tensor) -> Tensor:
        return self.policy(obs.to(torch.float32)).to(obs.dtype)


# ---- export -----------------------------------------------------------------------------------------------
def default_output(source: Path) -> Path:
    """``<run dir>/policy.onnx`` (or beside a checkpoint file given directly)."""
    source = Path(source)
    return (source if source.is_dir() else source.parent) / "policy.onnx"


def report_path_for(onnx_path: Path) -> Path:
    return Path(onnx_path).with_suffix(".verification.json")


def rejected_report_path_for(onnx_path: Path) -> Path:
    """Where the record of a failed verification goes: beside, never over, a file that passed."""
    return Path(onnx_path).with_suffix(".rejected.verification.json")


@contextlib.contextmanager
def _quiet_logging():
    """The exporter and its graph optimiser log every pass at INFO; none of it concerns the user."""
    before = logging.root.manager.disable
    logging.disable(logging.WARNING)
    try:
        yield
    finally:
        logging.disable(before)


def _to_onnx(policy: Policy, obs_dim: int, opset: int) -> bytes:
    """Serialise ``policy`` (float32, eval mode) to ONNX bytes with a dynamic batch dimension."""
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "policy.onnx")
        example = torch.zeros(2, obs_dim, dtype=torch.float32)
        with warnings.catch_warnings(), contextlib.redirect_stdout(io.StringIO()), _quiet_logging():
            warnings.simplefilter("ignore")
            # external_data=False keeps the weights inside the one file (the default writes a .onnx.data beside it).
            torch.onnx.export(policy, (example,), path, dynamo=True, external_data=False, opset_version=opset,
                              input_names=[INPUT_NAME], output_names=[OUTPUT_NAME],
                              dynamic_shapes=({0: torch.export.Dim("batch")},), verbose=False, report=False)
        with open(path, "rb") as f:
            return f.read()


def _finish(raw: bytes, meta: Mapping[str, str]) -> bytes:
    """Add metadata and a docstring, and pass the result through ``onnx.checker`` (full check)."""
    import onnx

    model = onnx.load_from_string(raw)
    wrote = {o.domain: o.version for o in model.opset_import}.get("", 0)
    asked = int(meta[PREFIX + "opset"])
    if wrote != asked:
        raise ValueError(f"export.opset={asked}: torch's exporter wrote opset {wrote} instead (it cannot convert this "
                         f"graph that far); choose export.opset between 15 and 23")
    del model.metadata_props[:]
    for k, v in meta.items():
        entry = model.metadata_props.add()
        entry.key, entry.value = k, v
    model.producer_name = "apg-export"
    model.doc_string = (f"apg policy for {meta[PREFIX + 'system']}: {INPUT_NAME} (batch, n) float32 -> {OUTPUT_NAME} "
                        f"(batch, m) float32 in the system's units. {HARDWARE_CAUTION}")
    onnx.checker.check_model(model, full_check=True)
    return model.SerializeToString()


def heldout_observations(system: System, policy: nn.Module, n: int, seed: int, horizon: int,
                         dtype: torch.dtype = torch.float64) -> Tensor:
    """``n`` observations of states visited by closed-loop trajectories from fresh initial states, ``(n, obs_dim)``."""
    gen = torch.Generator().manual_seed(seed)
    episodes = max(1, min(n, 256))
    x0 = system.sample_initial(episodes, gen, dtype)
    traj = evaluate(system, policy, x0, max(horizon, 1)).trajectory
    obs = system.observe(traj.states).reshape(-1, system.obs_dim)  # (T+1) * B rows
    idx = torch.randperm(obs.shape[0], generator=gen)[:n]
    if len(idx) < n:  # short horizons: top up with initial states
        extra = system.observe(system.sample_initial(n - len(idx), gen, dtype))
        return torch.cat([obs[idx], extra])
    return obs[idx]


def _half_range(system: System) -> Tensor:
    lo = torch.tensor(system.action_low, dtype=torch.float64)
    hi = torch.tensor(system.action_high, dtype=torch.float64)
    return ((hi - lo) / 2).clamp_min(1e-12)


def verify(system: System, policy: Policy, onnx_model: Path | str | bytes, settings: ExportSettings,
           horizon: int) -> dict[str, Any]:
    """Compare the exported model with the torch policy; returns the verification record (``passed`` inside).

    Output parity runs both in float32 on ``settings.observations`` held-out observations; closed-loop parity
    simulates in float64 with both policies computing in float32, from ``settings.rollouts`` initial states.
    """
    torch_policy = Float32Policy(policy)
    onnx_policy = OnnxPolicy(onnx_model)
    steps = settings.horizon or horizon or 100
    obs = heldout_observations(system, torch_policy, settings.observations, settings.seed, steps)
    obs32 = obs.to(torch.float32)
    with torch.no_grad():
        a_torch = torch_policy(obs32).double()
    a_onnx = onnx_policy(obs32).double()
    diff = (a_onnx - a_torch).abs()  # (n, action_dim)
    scaled = diff / _half_range(system)
    limits_ok = bool(((a_onnx >= torch.tensor(system.action_low, dtype=torch.float64) - 1e-3 * _half_range(system))
                      & (a_onnx <= torch.tensor(system.action_high, dtype=torch.float64) + 1e-3 * _half_range(system))
                      ).all()) if policy.settings.squash == "tanh" else None
    output = {
        "observations": int(obs.shape[0]),
        "max_abs_diff": [float(v) for v in diff.max(0).values],  # per action, in its unit
        "max_scaled_diff": float(scaled.max()),
        "tolerance": settings.action_tolerance,
        "action_half_range": [float(v) for v in _half_range(system)],
        "passed": bool(scaled.max() <= settings.action_tolerance),
    }
    if limits_ok is not None:
        output["within_action_limits"] = limits_ok
        output["passed"] = output["passed"] and limits_ok

    x0 = system.sample_initial(settings.rollouts, torch.Generator().manual_seed(settings.seed + 1), torch.float64)
    ref: Evaluation = evaluate(system, torch_policy, x0, steps)
    got: Evaluation = evaluate(system, onnx_policy, x0, steps)
    rel = abs(got.mean_cost - ref.mean_cost) / max(abs(ref.mean_cost), 1e-12)
    closed = {
        "rollouts": settings.rollouts,
        "horizon": steps,
        "torch_mean_cost": ref.mean_cost,
        "onnx_mean_cost": got.mean_cost,
        "rel_cost_diff": rel,
        "max_episode_rel_cost_diff": float(((got.costs - ref.costs).abs() / ref.costs.abs().clamp_min(1e-12)).max()),
        "max_state_diff": float((got.trajectory.states - ref.trajectory.states).abs().max()),
        "torch_success_rate": ref.success_rate,
        "onnx_success_rate": got.success_rate,
        "success_disagreements": int((got.success != ref.success).sum()),
        "cost_rtol": settings.cost_rtol,
        "passed": bool(rel <= settings.cost_rtol and np.isfinite(got.mean_cost)),
    }
    return {"output_parity": output, "closed_loop_parity": closed,
            "passed": bool(output["passed"] and closed["passed"])}


def export(source: Path | str, output: Path | str | None = None, settings: ExportSettings = ExportSettings(), *,
           overwrite: bool = False, progress: Callable[[str], None] | None = None) -> ExportResult:
    """Export the policy of a run directory (or checkpoint file) to a verified ONNX file.

    Args:
        source: a run directory holding ``checkpoint.pt``, or a checkpoint file.
        output: the ``.onnx`` path; default ``<run dir>/policy.onnx``.
        overwrite: replace an existing file at ``output``.
        progress: called with a short line before each stage.

    Returns:
        The written paths and the verification record (also in ``<name>.verification.json``).

    Raises:
        CheckpointError: ``source`` is missing, corrupt or not an apg checkpoint.
        ValueError: the checkpoint's policy does not fit its system, or a bad ``output``.
        VerificationError: a parity check failed (the record is written, the ``.onnx`` is not).
    """
    say = progress or (lambda _msg: None)
    source = Path(source)
    out = Path(output) if output else default_output(source)
    if out.suffix != ".onnx":
        raise ValueError(f"output must end in .onnx, got {out}")
    if out.exists() and not overwrite:
        raise FileExistsError(f"{out} exists; pass overwrite=true to replace it, or choose another output")
    out.parent.mkdir(parents=True, exist_ok=True)

    say(f"loading {source}")
    run = load_run(source)
    policy, system = run.policy, run.system
    deployed = copy.deepcopy(policy).to(torch.float32).eval()
    meta = describe(run, settings.opset)
    ckpt_file = run.path
    meta[PREFIX + "checkpoint_sha256"] = hashlib.sha256(ckpt_file.read_bytes()).hexdigest()

    say(f"exporting to ONNX (opset {settings.opset})")
    data = _finish(_to_onnx(deployed, system.obs_dim, settings.opset), meta)

    say(f"verifying: {settings.observations} observations, {settings.rollouts} closed-loop rollouts")
    horizon = int(meta[PREFIX + "horizon"])
    record = verify(system, policy, data, settings, horizon)
    record = {"file": out.name, "system": system.name, "opset": settings.opset, "onnx_sha256":
              hashlib.sha256(data).hexdigest(), "checkpoint": str(ckpt_file), "record_digest":
              meta[PREFIX + "record_digest"], **record}
    report = report_path_for(out)
    if not record["passed"]:
        # An earlier file that passed, and its record, stay exactly as they were; the failure gets its own record.
        rejected = rejected_report_path_for(out)
        atomic_write_text(rejected, json.dumps(record, indent=2) + "\n")
        o, c = record["output_parity"], record["closed_loop_parity"]
        kept = f"; the earlier {out.name} and its record are kept unchanged" if out.exists() else ""
        raise VerificationError(
            f"the exported policy failed verification; nothing was written to {out}{kept}. Output parity: max "
            f"scaled difference {o['max_scaled_diff']:.3g} (bound {o['tolerance']:.3g}); closed-loop parity: "
            f"relative cost difference {c['rel_cost_diff']:.3g} (bound {c['cost_rtol']:.3g}). Details in {rejected}")
    atomic_write_bytes(out, data)  # each write is atomic: the file, then its record, replace the old ones
    atomic_write_text(report, json.dumps(record, indent=2) + "\n")
    rejected_report_path_for(out).unlink(missing_ok=True)  # a stale failure record would contradict this file
    return ExportResult(out, report, record)


__all__ = ["ExportSettings", "ExportResult", "VerificationError", "PolicyFileError", "export", "verify", "describe",
           "read_metadata", "system_from_metadata", "observation_layout", "OnnxPolicy", "Float32Policy",
           "HARDWARE_CAUTION", "DEFAULT_OPSET", "INPUT_NAME", "OUTPUT_NAME"]
