"""Experiment harness: does holding weights on a constraint set beat weight decay?

A study trains one model per (arm, grid point, seed) with ``holonomic.Langevin`` under one
shared budget, chooses each arm's setting on the validation split, and compares the chosen
settings on the test split against weight decay, paired by seed (t interval and Wilcoxon
signed-rank test). Command line: ``holonomic study FILE.toml --out DIR`` or
``holonomic study --demo --out DIR``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from holonomic.study.config import (
    ARM_NAMES,
    StudyConfig,
    StudyConfigError,
    load_config,
    parse_config,
)
from holonomic.study.demo import demo_config

__all__ = [
    "ARM_NAMES",
    "StudyConfig",
    "StudyConfigError",
    "demo_config",
    "load_config",
    "parse_config",
    "run_study",
]


def run_study(config: StudyConfig, out_dir: str | Path, workers: int = 1,
              progress: bool = True, plots: bool = True) -> dict[str, Any]:
    """Run (or resume) a study into ``out_dir`` and write every output.

    Returns the summary (the contents of ``summary.json``). Finished runs found under
    ``out_dir/runs`` are reused, so rerunning after an interruption only trains what is
    missing.
    """
    from holonomic.study.data import load_dataset
    from holonomic.study.report import write_outputs
    from holonomic.study.runner import run_all

    Path(out_dir).mkdir(parents=True, exist_ok=True)
    records = run_all(config, out_dir, workers=workers, progress=progress)
    description = load_dataset(config).description
    return write_outputs(config, out_dir, records, description, plots=plots)
