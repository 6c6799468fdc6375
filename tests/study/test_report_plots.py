"""Study plots from invented run records: colours, selection metric, spread, ticks, zeros."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from holonomic.study import parse_config
from holonomic.study.plots import ARM_COLOURS, arm_colour, build_figures, write_plots
from holonomic.study.report import select_settings
from holonomic.study.runner import RunSpec
from tests.study.conftest import tiny_document
from tests.study.fabricate import fabricate

pytest.importorskip("matplotlib")


def _config(seeds=3, selection="keep", epochs=3):
    doc = tiny_document()
    doc["study"]["seeds"] = seeds
    doc["budget"]["epochs"] = epochs
    config = parse_config(doc)
    return config if selection == "keep" else dataclasses.replace(config, selection=selection)


@pytest.fixture
def figures():
    import matplotlib.pyplot as plt

    made = []

    def build(config, records):
        out = build_figures(config, records, select_settings(config, records))
        made.extend(fig for _, _, fig in out)
        return {name: fig for name, _, fig in out}

    yield build
    for fig in made:
        plt.close(fig)


def _arm_of(label: str) -> str | None:
    name = label.split(" (")[0]
    return name if name in ARM_COLOURS else None


def test_one_colour_per_arm_in_every_figure(figures):
    from matplotlib.colors import to_hex

    config = _config()
    seen: dict[str, set[str]] = {}
    for name, fig in figures(config, fabricate(config)).items():
        for ax in fig.axes:
            for line in ax.get_lines():
                arm = _arm_of(line.get_label())
                if arm is not None:
                    seen.setdefault(arm, set()).add(to_hex(line.get_color()))
            for container in ax.containers:  # errorbar plots carry the label
                arm = _arm_of(container.get_label() or "")
                if arm is not None:
                    seen.setdefault(arm, set()).add(to_hex(container.lines[0].get_color()))
            for band in ax.collections:  # standard-error bands (gid: the arm)
                arm = band.get_gid() if band.get_gid() in ARM_COLOURS else None
                if arm is not None:
                    seen.setdefault(arm, set()).add(to_hex(band.get_facecolor()[0]))
    assert set(seen) == set(ARM_COLOURS)
    for arm, colours in seen.items():
        assert colours == {ARM_COLOURS[arm]}, arm
    # weights.png: the same arm has the same colour in both panels
    weights = figures(config, fabricate(config))["weights.png"]
    left = {_arm_of(l.get_label()): to_hex(l.get_color()) for l in weights.axes[0].get_lines()}
    right = {_arm_of(l.get_label()): to_hex(l.get_color()) for l in weights.axes[1].get_lines()}
    assert right and all(left[arm] == colour for arm, colour in right.items())
    assert arm_colour("some_new_arm") == arm_colour("some_new_arm")


def test_selection_plot_draws_the_selection_metric_and_the_choice(figures):
    config = _config(selection="val_balanced_accuracy")
    records = fabricate(config, noise=0.02)
    chosen = select_settings(config, records)
    fig = figures(config, records)["selection_vs_strength.png"]
    for ax in fig.axes:
        arm = config.arm(ax.get_title())
        values = np.array([[records[RunSpec(arm.name, i, arm.grid[i], s).key]["metrics"]
                            ["val_balanced_accuracy"] for s in config.seeds]
                           for i in range(len(arm.grid))])
        line = next(c for c in ax.containers if c.get_label() == arm.name).lines[0]
        np.testing.assert_allclose(line.get_ydata(), values.mean(axis=1), rtol=1e-12)
        ringed = next(l for l in ax.get_lines() if l.get_label().startswith("chosen"))
        assert list(ringed.get_xdata()) == [chosen[arm.name].strength]
        se = values.std(axis=1, ddof=1) / np.sqrt(len(config.seeds))
        bars = ax.containers[0].lines[2][0].get_segments()  # errorbar: mean ± se
        np.testing.assert_allclose([seg[1][1] - seg[0][1] for seg in bars], 2 * se,
                                   rtol=1e-9)
        assert "val_balanced_accuracy" in ax.get_ylabel()


def test_learning_curves_have_a_band_and_integer_epoch_ticks(figures):
    config = _config(epochs=3)
    records = fabricate(config, noise=0.02)
    chosen = select_settings(config, records)
    figs = figures(config, records)
    fig = figs["learning_curves.png"]
    fig.canvas.draw()
    for name in ("learning_curves.png", "weights.png"):
        for ax in figs[name].axes:
            figs[name].canvas.draw()
            ticks = [t for t in ax.get_xticks() if ax.get_xlim()[0] <= t <= ax.get_xlim()[1]]
            assert ticks and all(float(t).is_integer() for t in ticks), (name, ticks)
    ax = fig.axes[1]  # test accuracy
    sel = chosen["fixed_norm"]
    values = np.array([records[RunSpec("fixed_norm", sel.index, sel.strength, s).key]
                       ["history"]["test_accuracy"] for s in config.seeds])
    band = next(c for c in ax.collections if c.get_gid() == "fixed_norm")
    se = values.std(axis=0, ddof=1) / np.sqrt(len(config.seeds))
    top = band.get_paths()[0].vertices[:, 1].max()
    assert top == pytest.approx((values.mean(axis=0) + se).max(), rel=1e-12)


def test_regression_learning_curves_show_rmse(figures):
    config = _config(selection=None)
    records = fabricate(config, "regression")
    fig = figures(config, records)["learning_curves.png"]
    assert fig.axes[0].get_ylabel() == "rmse"
    sel = select_settings(config, records)["weight_decay"]
    line = next(l for l in fig.axes[0].get_lines() if l.get_label().startswith("weight_decay"))
    expected = np.mean([records[RunSpec("weight_decay", sel.index, sel.strength, s).key]
                        ["history"]["train_rmse"] for s in config.seeds], axis=0)
    np.testing.assert_allclose(line.get_ydata(), expected, rtol=1e-12)


def test_zero_residuals_are_not_drawn_on_the_log_axis(figures):
    config = _config(epochs=4)
    # residual history 0, 3e-7, 0, 3e-7 (max_norm: all 0)
    records = fabricate(config, residual=3e-7, epochs=4)
    ax = figures(config, records)["weights.png"].axes[1]
    assert ax.get_yscale() == "log"
    lines = {_arm_of(l.get_label()): np.asarray(l.get_ydata(), float) for l in ax.get_lines()}
    assert set(lines) == {"fixed_norm", "orthonormal"}
    for y in lines.values():
        assert np.isnan(y[[0, 2]]).all() and np.allclose(y[[1, 3]], 3e-7)
    assert any("max_norm" in t.get_text() for t in ax.texts)


def test_write_plots_writes_every_file(tmp_path):
    config = _config(seeds=2)
    records = fabricate(config)
    written = write_plots(config, records, select_settings(config, records), tmp_path)
    names = [w.split(":")[0] for w in written]
    assert names == ["selection_vs_strength.png", "gap_vs_strength.png", "learning_curves.png",
                     "weights.png"]
    assert all((tmp_path / n).stat().st_size > 0 for n in names)
