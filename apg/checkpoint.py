"""Checkpoints: everything needed to resume a run bit-for-bit, written atomically."""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
from pathlib import Path
from typing import Any

import torch

FORMAT = "apg-checkpoint"
VERSION = 2  # 2: the run record (apg.runs.RunRecord) replaced the raw config
CHECKPOINT_NAME = "checkpoint.pt"
REQUIRED = ("format", "version", "record", "iteration", "policy", "update", "generator", "torch_rng", "env_steps",
            "wall_time_s")


class CheckpointError(RuntimeError):
    """A checkpoint is missing, unreadable, or does not belong to this run."""


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` so that a crash leaves either the old file or the new one, never half."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600 files; give the mode a plain open() would
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def atomic_write_text(path: Path, text: str) -> None:
    atomic_write_bytes(path, text.encode("utf-8"))


def save_checkpoint(path: Path, state: dict[str, Any]) -> None:
    """Atomically save ``state`` (see :data:`REQUIRED` for the keys a checkpoint carries)."""
    import io

    buf = io.BytesIO()
    torch.save({"format": FORMAT, "version": VERSION, **state}, buf)
    atomic_write_bytes(Path(path), buf.getvalue())


def load_checkpoint(path: Path) -> dict[str, Any]:
    """Load and check a checkpoint. Raises :class:`CheckpointError` with the reason and the path."""
    path = Path(path)
    if path.is_dir():
        path = path / CHECKPOINT_NAME
    if not path.exists():
        raise CheckpointError(f"no checkpoint at {path}")
    try:
        # weights_only: tensors and plain containers only. A file a user hands us is data, never code: a pickle
        # that would construct anything else (and so could run code) is refused, not executed.
        state = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as e:  # torch raises several types for truncated, foreign or code-carrying files
        raise CheckpointError(f"{path} is not a readable checkpoint ({type(e).__name__}: {str(e).splitlines()[0]}); "
                              f"it may be truncated, from another program, or carry code, which is never run") from None
    if not isinstance(state, dict) or state.get("format") != FORMAT:
        raise CheckpointError(f"{path} is not an apg checkpoint")
    if state.get("version") != VERSION:
        raise CheckpointError(f"{path} has checkpoint version {state.get('version')}, this apg reads {VERSION}: "
                              f"it was written by another version of apg; train the run again with this one")
    missing = [k for k in REQUIRED if k not in state]
    if missing:
        raise CheckpointError(f"{path} lacks {missing}; it is incomplete")
    return state
