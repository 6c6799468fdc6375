"""Helpers for the robustness and command-line tests: a small study and directory snapshots."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np

from tests.study.conftest import TINY_TOML

#: Six runs of seconds each: the tiny study of conftest (invented demo data) with fewer arms.
SMALL_TOML = (TINY_TOML.split("[arms.none]")[0].replace('name = "tiny"', 'name = "small"')
              + "[arms.none]\n[arms.weight_decay]\ngrid = [1e-3]\n[arms.fixed_norm]\ngrid = [0.5]\n")

N_SMALL_RUNS = 6


def write_study(folder: Path, text: str = SMALL_TOML, name: str = "small.toml") -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / name
    path.write_text(text)
    return path


def with_data_file(text: str, source: str) -> str:
    """The study text reading ``source`` (a CSV with target column ``label``)."""
    return text.replace('source = "demo"', f'source = "{source}"\ntarget = "label"')


def write_invented_csv(path: Path, n: int = 200, seed: int = 0) -> None:
    """An invented two-class data set (three features; the label depends on their sum)."""
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 3))
    y = np.where(x.sum(axis=1) + 0.3 * rng.normal(size=n) > 0, "yes", "no")
    lines = ["a,b,c,label"] + [f"{r[0]:.6f},{r[1]:.6f},{r[2]:.6f},{lab}"
                               for r, lab in zip(x, y)]
    path.write_text("\n".join(lines) + "\n")


def snapshot(root: Path) -> dict[str, bytes | None]:
    """Every file (contents) and folder (None) under ``root``, by relative path."""
    if not root.exists():
        return {}
    return {str(p.relative_to(root)): (p.read_bytes() if p.is_file() else None)
            for p in sorted(root.rglob("*"))}


def copy_study(source: Path, target: Path) -> Path:
    shutil.copytree(source, target)
    return target


def forget_loaded_data() -> None:
    """Drop the per-process data caches (a test that rewrites a data file in place)."""
    from holonomic.study import data

    for value in list(vars(data).values()):
        if callable(getattr(value, "cache_clear", None)):
            value.cache_clear()
