"""The README's library example runs as printed, so it cannot drift from the API.

The block is taken from README.md's "Library use" section (the first fenced ``python`` block after that heading,
CommonMark spec sec. 4.5 fenced code blocks) and executed in a fresh directory. What it must show is stated by the
README itself: the 12 t plant it asks for is the plant in the exported file's metadata and in the reloaded run.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest
import torch

import envs

README = Path(__file__).resolve().parents[1] / "README.md"
SECTION = "## Library use"
FENCE = re.compile(r"^```python\n(.*?)^```", flags=re.M | re.S)


def library_example(text: str) -> str:
    """The first ```python block after the "Library use" heading; a clear error if the README lost it."""
    start = text.find(SECTION)
    if start < 0:
        raise ValueError(f"README.md has no {SECTION!r} section; the library example belongs there")
    end = text.find("\n## ", start + len(SECTION))
    found = FENCE.search(text[start:end if end >= 0 else len(text)])
    if found is None:
        raise ValueError(f"README.md's {SECTION!r} section has no ```python block")
    return found.group(1)


def test_the_extractor_finds_only_the_library_block():
    """The extraction can fail: a block outside the section, or none at all, is not taken."""
    doc = "# T\n```python\nwrong = 1\n```\n## Library use\ntext\n```python\nright = 2\n```\n## Next\n```python\nx\n```\n"
    assert library_example(doc) == "right = 2\n"
    with pytest.raises(ValueError, match="no ```python block"):
        library_example("## Library use\nno code here\n## Next\n```python\nx = 1\n```\n")
    with pytest.raises(ValueError, match="no '## Library use' section"):
        library_example("# nothing\n")


def test_the_readme_library_example_runs_and_states_its_plant(tmp_path, monkeypatch, capsys):
    code = library_example(README.read_text())
    monkeypatch.chdir(tmp_path)  # the example writes runs/crane-12t relative to the working directory
    scope: dict = {"__name__": "readme_example"}
    exec(compile(code, f"{README}:library example", "exec"), scope)

    # The plant the example asks for differs from the class default, so the checks below can tell them apart.
    assert envs.build("crane").params.load_mass == 10_000.0
    printed = capsys.readouterr().out.split()
    assert [float(v) for v in printed] == [12_000.0, 12_000.0], printed

    # The rollout has the shapes its comment states, and backward() left a finite, non-zero gradient.
    traj, policy = scope["traj"], scope["policy"]
    assert tuple(traj.states.shape) == (51, 64, 4) and tuple(traj.actions.shape) == (50, 64, 1)
    grads = [p.grad for p in policy.parameters()]
    assert all(g is not None and torch.isfinite(g).all() for g in grads)
    assert sum(float(g.abs().sum()) for g in grads) > 0.0

    # The run recorded and wrote the 12 t plant; the exported file sits in the run directory.
    result = scope["result"]
    assert result.record.system.params["load_mass"] == 12_000.0
    assert result.metrics["system"] == "crane" and result.metrics["iterations"] == 5
    assert Path(scope["onnx_file"]).resolve() == (tmp_path / "runs" / "crane-12t" / "policy.onnx").resolve()
    assert "load_mass: 12000.0" in (tmp_path / "runs" / "crane-12t" / "config.yaml").read_text()
