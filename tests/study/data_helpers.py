"""Small invented data files for the data tests (written into a test's tmp_path)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from holonomic.study import StudyConfigError, parse_config
from holonomic.study.data import load_dataset
from tests.study.conftest import tiny_document


def config(tmp_path: Path, **data):
    """The tiny study with ``[data]`` replaced by ``data``."""
    doc = tiny_document()
    doc["data"] = dict(data)
    return parse_config(doc, base_dir=tmp_path)


def load(tmp_path: Path, **data):
    cfg = config(tmp_path, **data)
    return cfg, load_dataset(cfg)


def load_error(tmp_path: Path, **data) -> str:
    """The message of the StudyConfigError that parsing or loading raises."""
    try:
        load(tmp_path, **data)
    except StudyConfigError as exc:
        return str(exc)
    raise AssertionError(f"no StudyConfigError for {data}")


def write(tmp_path: Path, name: str, text: str | bytes) -> str:
    path = tmp_path / name
    path.parent.mkdir(parents=True, exist_ok=True)
    if isinstance(text, bytes):
        path.write_bytes(text)
    else:
        path.write_text(text, encoding="utf-8")
    return name


def classes_csv(n: int = 40, seed: int = 0, extra: dict[str, list[str]] | None = None,
                labels: tuple[str, ...] = ("x", "y")) -> str:
    """Invented data: two features a, b and a label column, plus ``extra`` columns."""
    rng = np.random.default_rng(seed)
    a, b = rng.normal(size=n), rng.normal(size=n)
    label = [labels[i % len(labels)] for i in range(n)]
    extra = extra or {}
    header = ",".join(["a", "b", "label", *extra])
    rows = [",".join([f"{a[i]:.6f}", f"{b[i]:.6f}", label[i], *(v[i] for v in extra.values())])
            for i in range(n)]
    return "\n".join([header, *rows]) + "\n"


def regression_csv(n: int = 60, seed: int = 0, extra: dict[str, list[str]] | None = None) -> str:
    """Invented data: features a, b and a continuous target t = 3 a - b + noise."""
    rng = np.random.default_rng(seed)
    a, b = rng.normal(size=n), rng.normal(size=n)
    t = 3 * a - b + 0.1 * rng.normal(size=n)
    extra = extra or {}
    header = ",".join(["a", "b", "t", *extra])
    rows = [",".join([f"{a[i]:.6f}", f"{b[i]:.6f}", f"{t[i]:.6f}",
                      *(v[i] for v in extra.values())]) for i in range(n)]
    return "\n".join([header, *rows]) + "\n"
