"""What ``apg-compare`` leaves in its run directory: CSV files, PNG figures, TensorBoard events and ``report.md``.

TensorBoard gets the curves as scalars (held-out cost against simulator steps and against compute milliseconds,
one run per entrant and seed; the study's error, variance and cosine against samples); the figures are PNG files.

Everything here reads the rows :mod:`apg.compare` returns; nothing is recomputed. File names are in
:data:`FILES` so the docs and tests name the same strings.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path
from typing import Any, Sequence

import matplotlib.pyplot as plt
import numpy as np

from apg.compare import RaceResult, race_summary

FILES = {
    "study": "study.csv",
    "curves": "race_curves.csv",
    "runs": "race_runs.csv",
    "summary": "race_summary.csv",
    "cost_vs_steps": "race_cost_vs_steps.png",
    "cost_vs_seconds": "race_cost_vs_seconds.png",
    "error_vs_samples": "study_error_vs_samples.png",
    "variance_vs_horizon": "study_variance_vs_horizon.png",
    "report": "report.md",
    "tensorboard": "tensorboard",
}


def write_csv(path: Path, rows: Sequence[dict[str, Any]]) -> None:
    """Rows of dicts to CSV; the header is the union of keys in first-seen order."""
    keys: list[str] = []
    for r in rows:
        keys += [k for k in r if k not in keys]
    with open(path, "w", newline="") as f:
        w = csv.DictWriter(f, fieldnames=keys)
        w.writeheader()
        w.writerows(rows)


def _fmt(v: float, digits: int = 3) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "n/a"
    if isinstance(v, float) and math.isinf(v):
        return "never"
    return f"{v:.{digits}g}"


def _ratio(v: float) -> str:
    return "n/a" if not math.isfinite(v) else f"{v:.3g}x"


# ---- figures ---------------------------------------------------------------------------------------------------------
def _colours(labels: Sequence[str]) -> dict[str, Any]:
    cmap = plt.get_cmap("tab10")
    return {k: cmap(i % 10) for i, k in enumerate(labels)}


def race_figure(result: RaceResult, budget: str, axis: str) -> plt.Figure:
    """Held-out cost against simulator steps (``axis="env_steps"``) or compute seconds, one line per seed."""
    labels = [e.label for e in result.entrants]
    colours = _colours(labels)
    fig, ax = plt.subplots(figsize=(7, 4.2))
    for label in labels:
        pts = [c for c in result.curves if c["budget"] == budget and c["entrant"] == label]
        for i, seed in enumerate(sorted({c["seed"] for c in pts})):
            run = [c for c in pts if c["seed"] == seed and c[axis] > 0]  # log axis: the start is drawn below
            x = np.array([c[axis] for c in run])
            y = np.array([c["heldout_cost"] for c in run])
            ax.plot(x, y, "-", color=colours[label], lw=1.3, alpha=0.85, label=label if i == 0 else None)
    start = [c["heldout_cost"] for c in result.curves if c["budget"] == budget and c["iteration"] == 0]
    if start:
        ax.axhline(float(np.median(start)), color="0.5", ls="--", lw=1, label="initial policy")
    if result.target is not None:
        ax.axhline(result.target, color="k", ls=":", lw=1, label=f"target {result.target:.3g}")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("simulator steps" if axis == "env_steps" else "compute seconds")
    ax.set_ylabel("held-out cost")
    what = "steps" if budget == "steps" else "seconds"
    system = result.runs[0]["system"] if result.runs else ""
    ax.set_title(f"{system}: equal-{what} race, {len(result.settings.seeds)} seeds", fontsize=10)
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=8)
    fig.tight_layout()
    return fig


def error_figure(rows: Sequence[dict[str, Any]]) -> plt.Figure:
    """Relative error against samples per estimate, one panel per horizon; the analytic row sits at 0."""
    horizons = sorted({r["horizon"] for r in rows})
    labels = list(dict.fromkeys(r["estimator"] for r in rows if r["samples"] > 0))
    colours = _colours(labels)
    fig, axes = plt.subplots(1, len(horizons), figsize=(4 * len(horizons), 3.6), squeeze=False, sharey=True)
    for ax, h in zip(axes[0], horizons):
        for label in labels:
            pts = [r for r in rows if r["horizon"] == h and r["estimator"] == label and r["samples"] > 0
                   and math.isfinite(r["rel_error"])]
            if pts:
                ax.plot([r["samples"] for r in pts], [r["rel_error"] for r in pts], "o-", color=colours[label],
                        label=label)
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_title(f"horizon {h}", fontsize=10)
        ax.set_xlabel("samples per estimate (pairs / rollouts per state)")
        ax.grid(alpha=0.3, which="both")
    axes[0][0].set_ylabel("relative error vs own reference")
    axes[0][0].legend(fontsize=8)
    fig.suptitle("gradient error against the objective each estimator is unbiased for", fontsize=10)
    fig.tight_layout()
    return fig


def variance_figure(rows: Sequence[dict[str, Any]]) -> plt.Figure:
    """Left: estimator variance (largest sample count) against horizon. Right: the exact gradient's norm and its
    variance over initial states against horizon, the exploding-gradient signature on chaotic systems."""
    horizons = sorted({r["horizon"] for r in rows})
    labels = list(dict.fromkeys(r["estimator"] for r in rows if r["samples"] > 0))
    colours = _colours(labels)
    fig, (ax, bx) = plt.subplots(1, 2, figsize=(10, 3.8))
    for label in labels:
        top = max(r["samples"] for r in rows if r["estimator"] == label)
        pts = sorted((r for r in rows if r["estimator"] == label and r["samples"] == top), key=lambda r: r["horizon"])
        ax.plot([r["horizon"] for r in pts], [r["variance"] for r in pts], "o-", color=colours[label],
                label=f"{label} ({top} samples)")
    ax.set_yscale("log")
    ax.set_xlabel("horizon [steps]")
    ax.set_ylabel("variance of the estimate (trace)")
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=8)
    exact = sorted((r for r in rows if r["samples"] == 0), key=lambda r: r["horizon"])
    if exact:
        bx.plot([r["horizon"] for r in exact], [r["exact_norm"] ** 2 for r in exact], "s-", color="k",
                label="|exact gradient|^2")
        bx.plot([r["horizon"] for r in exact], [r["x0_variance"] for r in exact], "o--", color="k",
                label="its variance over initial states")
    smoothed = {}
    for r in rows:
        if r["samples"] > 0 and math.isfinite(r["x0_variance"]):
            smoothed[(r["estimator"], r["horizon"])] = r["x0_variance"]
    for label in labels:
        pts = sorted((h, v) for (k, h), v in smoothed.items() if k == label)
        if pts:
            bx.plot(*zip(*pts), ".:", color=colours[label], label=f"{label} reference: variance over initial states")
    bx.set_yscale("log")
    bx.set_xlabel("horizon [steps]")
    bx.grid(alpha=0.3, which="both")
    bx.legend(fontsize=7)
    fig.suptitle(f"{rows[0]['system']}: gradient variance against horizon", fontsize=10)
    fig.tight_layout()
    return fig


# ---- tables and the report ---------------------------------------------------------------------------------------------
def summary_table(summary: Sequence[dict[str, Any]], budget: str = "steps") -> str:
    """A plain-text table for the terminal."""
    head = ["entrant", "steps/iter", "final cost (median [min, max])", "success", "reached",
            "steps to target", "x ref", "seconds to target", "x ref"]
    body = []
    for r in summary:
        if r["budget"] != budget:
            continue
        body.append([r["entrant"], f"{r['steps_per_iteration']:,}",
                     f"{_fmt(r['final_cost_median'])} [{_fmt(r['final_cost_min'])}, {_fmt(r['final_cost_max'])}]",
                     f"{_fmt(100 * r['success_median'], 3)}%", f"{r['reached']}/{r['seeds']}",
                     _fmt(r["steps_to_target"]), _ratio(r["steps_ratio"]),
                     _fmt(r["seconds_to_target"]), _ratio(r["seconds_ratio"])])
    widths = [max(len(str(x)) for x in col) for col in zip(head, *body)]
    line = lambda cells: "  ".join(str(c).ljust(w) for c, w in zip(cells, widths))  # noqa: E731
    return "\n".join([line(head), line(["-" * w for w in widths]), *(line(b) for b in body)])


def _md_table(head: Sequence[str], body: Sequence[Sequence[Any]]) -> str:
    out = ["| " + " | ".join(head) + " |", "|" + "|".join("---" for _ in head) + "|"]
    out += ["| " + " | ".join(str(c) for c in row) + " |" for row in body]
    return "\n".join(out)


def headline(summary: Sequence[dict[str, Any]], result: RaceResult, budget: str = "steps") -> list[str]:
    """One sentence per entrant: its step and time ratio to the reference at the target, or that it missed."""
    ref = result.settings.reference
    out = []
    for r in summary:
        if r["budget"] != budget or r["entrant"] == ref:
            continue
        if result.target is None:
            out.append(f"- **{r['entrant']}**: no target cost could be set ({result.target_note}).")
        elif not math.isfinite(r["steps_to_target"]):
            out.append(f"- **{r['entrant']}** did not reach the target cost {result.target:.4g} within the budget "
                       f"({r['reached']}/{r['seeds']} seeds reached it; median final cost "
                       f"{_fmt(r['final_cost_median'])}).")
        elif not math.isfinite(r["steps_ratio"]):
            out.append(f"- **{r['entrant']}** reached the target after {_fmt(r['steps_to_target'])} steps and "
                       f"{_fmt(r['seconds_to_target'])} s; {ref} did not reach it, so there is no ratio.")
        else:
            out.append(f"- **{r['entrant']}** needed **{_ratio(r['steps_ratio'])} the simulator steps** and "
                       f"**{_ratio(r['seconds_ratio'])} the compute time** of {ref} to reach held-out cost "
                       f"{result.target:.4g} ({_fmt(r['steps_to_target'])} steps, {_fmt(r['seconds_to_target'])} s; "
                       f"median over {r['seeds']} seeds, {r['reached']} reached it).")
    return out


def _settings_text(entrant) -> str:
    if entrant.method == "ppo":
        p = entrant.ppo
        return (f"{p.epochs} epochs x {p.minibatches} minibatches, clip ratio {p.clip_ratio:g}, gamma {p.gamma:g}, "
                f"lambda {p.gae_lambda:g}, initial action std {p.initial_action_std:g}")
    e = entrant.estimator
    return {"analytic": f"{e.window}-step windows" if e.window else "-",
            "terminal_value": f"{e.window}-step windows, value net {list(e.critic_hidden)}, lr {e.critic_lr:g}, "
                              f"{e.critic_iterations} fits per iteration",
            "es": f"{e.pairs} antithetic pairs, sigma {e.sigma:g}" + (", rank shaping" if e.rank_shaping else ""),
            "likelihood_ratio": f"{e.samples} rollouts per state, action noise {e.action_noise:g}, {e.baseline} baseline",
            "alpha_order": f"alpha {e.alpha:g}, {e.samples} rollouts per state, action noise {e.action_noise:g}"}.get(
        e.name, e.name)


def report_markdown(system_name: str, success_criterion: str, study: Sequence[dict[str, Any]] | None,
                    result: RaceResult | None, summary: Sequence[dict[str, Any]] | None, notes: Sequence[str]) -> str:
    """The run's ``report.md``."""
    lines = [f"# apg-compare: {system_name}", ""]
    lines += [f"- {n}" for n in notes]
    lines.append("")
    if result is not None and summary is not None:
        s = result.settings
        lines += ["## Training race", "",
                  f"Every entrant starts from the same initial policy (same seed and policy settings) and is scored "
                  f"on the same held-out initial states. Budgets per run: {s.budget_steps:,} simulator steps"
                  + (f"; separately, {s.budget_seconds:g} s of the trainer's clock" if s.budget_seconds else "")
                  + f". Seeds: {list(s.seeds)}. Held-out evaluations per run: about {s.evaluations}, so steps and "
                  f"seconds to target are resolved to one evaluation interval.", "",
                  f"Target cost: {result.target_note}. Success criterion: {success_criterion or 'n/a'}.", "",
                  "Seconds are compute seconds (rollouts, gradient and optimiser steps), measured on this machine; "
                  "held-out evaluations are excluded (every entrant does the same number).", ""]
        lines += ["### Entrants", "", _md_table(
            ["entrant", "method", "settings", "states per iteration", "training horizon", "held-out horizon",
             "optimiser", "simulator steps per iteration"],
            [[e.label, e.description, _settings_text(e), e.train.batch_size, e.train.horizon, e.train.eval_steps,
              f"{e.optim.name} lr {e.optim.lr:g} ({e.optim.schedule}), clip {e.train.grad_clip:g}",
              f"{e.steps_per_iteration:,}"] for e in result.entrants]), ""]
        for budget in s.budgets:
            lines += [f"### Equal {budget} budget", ""]
            body = [[r["entrant"], r["description"], f"{r['steps_per_iteration']:,}",
                     f"{_fmt(r['final_cost_median'])} [{_fmt(r['final_cost_min'])}, {_fmt(r['final_cost_max'])}]",
                     f"{_fmt(100 * r['success_median'])}%", f"{r['reached']}/{r['seeds']}",
                     _fmt(r["steps_to_target"]), _ratio(r["steps_ratio"]), _fmt(r["seconds_to_target"]),
                     _ratio(r["seconds_ratio"]), r["diverged"]]
                    for r in summary if r["budget"] == budget]
            lines += [_md_table(["entrant", "method", "steps/iteration", "final held-out cost (median [min, max])",
                                 "success (median)", "reached target", "steps to target", f"x {s.reference}",
                                 "seconds to target", f"x {s.reference}", "diverged runs"], body), ""]
            lines += headline(summary, result, budget) + [""]
        lines += [f"![cost vs steps]({FILES['cost_vs_steps']})", f"![cost vs seconds]({FILES['cost_vs_seconds']})", ""]
    if study:
        lines += ["## Gradient study", "",
                  "At fixed parameters and one fixed minibatch of initial states. Each sampled estimator is compared "
                  "with the reference gradient of the objective it is unbiased for: the exact objective for BPTT, the "
                  "parameter-smoothed objective E[J(theta + sigma eps)] for ES (reference: mean of BPTT gradients at "
                  "perturbed parameters), the action-smoothed objective for the likelihood-ratio and alpha-order "
                  "estimators (reference: mean pathwise gradient over many noise draws). `cos exact` is the cosine "
                  "with the exact BPTT gradient of the unsmoothed objective. `x0 variance` is how much the reference "
                  "gradient varies with the minibatch's initial states (trace of the covariance).", ""]
        body = [[r["horizon"], r["estimator"], r["samples"] or "-", f"{r['sim_steps']:,}", _fmt(r["seconds"]),
                 _fmt(r["rel_error"]), _fmt(r["rel_bias"]), _fmt(r["variance"]), _fmt(r["cosine_exact"]),
                 _fmt(r["exact_norm"]), _fmt(r["x0_variance"]), _fmt(r["reference_rel_se"]), r["objective"]]
                for r in study]
        lines += [_md_table(["horizon", "estimator", "samples", "steps/estimate", "seconds/estimate", "rel. error",
                             "rel. bias", "variance", "cos exact", "|exact grad|", "x0 variance", "ref. rel. s.e.",
                             "reference objective"], body), "",
                  f"![error vs samples]({FILES['error_vs_samples']})",
                  f"![variance vs horizon]({FILES['variance_vs_horizon']})", ""]
    return "\n".join(lines)


def write_outputs(out_dir: Path, system_name: str, success_criterion: str, study: Sequence[dict[str, Any]] | None,
                  result: RaceResult | None, notes: Sequence[str]) -> list[dict[str, Any]] | None:
    """Write every file in :data:`FILES` that applies; returns the race summary rows (or ``None``)."""
    from torch.utils.tensorboard import SummaryWriter

    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    writer = SummaryWriter(str(out_dir / FILES["tensorboard"]))
    summary = None
    try:
        if study:
            write_csv(out_dir / FILES["study"], study)
            for name, fig in (("error_vs_samples", error_figure(study)), ("variance_vs_horizon", variance_figure(study))):
                fig.savefig(out_dir / FILES[name], dpi=120)
                plt.close(fig)
            for r in study:
                tag = f"study/H{r['horizon']}/{r['estimator']}"
                for key in ("rel_error", "variance", "cosine_exact"):
                    if math.isfinite(r[key]):
                        writer.add_scalar(f"{tag}/{key}", r[key], r["samples"])
        if result is not None:
            summary = race_summary(result)
            write_csv(out_dir / FILES["curves"], result.curves)
            write_csv(out_dir / FILES["runs"], result.runs)
            write_csv(out_dir / FILES["summary"], summary)
            budget = "seconds" if "seconds" in result.settings.budgets else "steps"
            for name, b, axis in (("cost_vs_steps", "steps", "env_steps"), ("cost_vs_seconds", budget, "compute_seconds")):
                fig = race_figure(result, b, axis)
                fig.savefig(out_dir / FILES[name], dpi=120)
                plt.close(fig)
            for c in result.curves:
                tag = f"race/{c['budget']}/{c['entrant']}/seed{c['seed']}"
                writer.add_scalar(f"{tag}/heldout_cost_vs_env_steps", c["heldout_cost"], int(c["env_steps"]))
                writer.add_scalar(f"{tag}/heldout_cost_vs_compute_ms", c["heldout_cost"],
                                  int(round(1000 * c["compute_seconds"])))
        (out_dir / FILES["report"]).write_text(report_markdown(system_name, success_criterion, study, result,
                                                               summary, notes) + "\n")
    finally:
        writer.close()
    return summary


__all__ = ["FILES", "write_outputs", "summary_table", "report_markdown", "headline", "write_csv"]
