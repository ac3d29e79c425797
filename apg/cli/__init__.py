"""Command-line entry points: each composes a Hydra config and calls one library function."""
