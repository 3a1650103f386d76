"""Every figure of a small assessment: labelled axes with units, colours from mnemode's scheme,
numbers in TensorBoard.

The figures are drawn from a real (small) assessment of unfitted models on the
demo system; labels and colours are read back from the matplotlib objects, and
TensorBoard scalars with TensorBoard's own event reader. The palette's hues are
checked against the published Okabe–Ito values.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from matplotlib.colors import to_hex
from matplotlib.lines import Line2D
from matplotlib.patches import PathPatch, Rectangle

from mnemode.assess import assessment as assessment_module
from mnemode.assess import figures as figs
from mnemode.assess import palette
from mnemode.assess.assessment import AssessSettings, ModelEntry, assess_models
from mnemode.assess.run_figures import build_run_figures, run_figures
from mnemode.data import generate
from mnemode.pipeline import build_model, compose_config, make_system, model_specs
from mnemode.solvers import RK4


def test_palette_hues_are_the_published_colour_universal_design_set():
    # Okabe & Ito (2008), "Color Universal Design" (recalled from memory): orange E69F00,
    # sky blue 56B4E9, bluish green 009E73, yellow F0E442, blue 0072B2, vermillion D55E00,
    # reddish purple CC79A7, black 000000.
    okabe_ito = {"#e69f00", "#56b4e9", "#009e73", "#f0e442", "#0072b2", "#d55e00", "#cc79a7", "#000000"}
    hues = {palette.TRUTH.color, palette.PHYSICS_ONLY.color, palette.ORACLE.color, *palette.MODEL_COLOURS}
    assert {h.lower() for h in hues} <= okabe_ito
    styles = palette.line_styles(["physics_only", "memory", "memoryless", "data_only", "oracle"])
    learned = [styles[n] for n in ("memory", "memoryless", "data_only")]
    assert len({s.color for s in learned}) == 3 and len({str(s.ls) for s in learned}) == 3
    assert styles["physics_only"].role == "physics" and styles["oracle"].role == "reference"
    # the first 25 learned models never share colour and dash pattern both
    many = palette.line_styles([f"m{i}" for i in range(25)])
    assert len({(s.color, str(s.ls)) for s in many.values()}) == 25


@pytest.fixture(scope="module")
def small_assessment(tmp_path_factory):
    """Figures and TensorBoard events of a small assessment (unfitted closures, demo system)."""
    from torch.utils.tensorboard import SummaryWriter

    out = tmp_path_factory.mktemp("figures")
    cfg = compose_config(["experiment=tiny"])
    system = dataclasses.replace(make_system(cfg), spin_up=2.0)
    test = generate(system, n_trajectories=1, duration=8.0, dt=0.02, solver=RK4(0.01), seed=3, spin_up=2.0)
    models = {}
    for name, spec in model_specs(cfg).items():
        models[name] = ModelEntry(build_model(spec, system, 0.02), RK4(0.02))
    settings = AssessSettings(warm_up=1.0, horizon=1.0, n_starts=3, free_run_length=3.0, free_run_starts=2,
                              transient=0.5, acf_max_lag=0.4, n_bins=20, truth_step=0.01)
    captured = {}

    real_figures = assessment_module._figures

    def figures_step(run, result, floor_curves):
        built = real_figures(run, result, floor_curves)
        captured.update(built)
        return built

    writer = SummaryWriter(str(out / "tb"))
    # a fitted model's curve, written as the trajectory fitter writes it
    for step, loss in enumerate([0.5, 0.2, 0.1, 0.05]):
        writer.add_scalar("memory/train/loss", loss, step)
    writer.add_scalar("memory/val/validity_median", 0.8, 3)
    writer.flush()
    mp = pytest.MonkeyPatch()
    mp.setattr(assessment_module, "_figures", figures_step)
    try:
        result = assess_models(models, test, system, settings, out_dir=None, writer=writer)
    finally:
        mp.undo()
    fit = {"memoryless": {"train_error": 0.3, "fitter": "DerivativeFit"}}
    made = run_figures(out, models, test, settings.warm_up, result["horizon"], system.time_unit, writer, fit=fit,
                       order=list(result["models"]))
    writer.close()
    assert all((out / path).stat().st_size > 0 for path in made.values())
    extra, _ = build_run_figures(out, models, test, settings.warm_up, result["horizon"], system.time_unit, fit=fit,
                                 order=list(result["models"]))
    captured.update(extra)
    return captured, made, result, system, out


def _data_axes(fig):
    return [ax for ax in fig.axes if ax.lines or ax.patches or ax.collections]




def test_every_assessment_figure_has_labelled_axes_with_units(small_assessment):
    built, made, result, system, _ = small_assessment
    keys = ["forecast_traces", "error_growth", "validity_times", "invariant_densities", "autocorrelation",
            "training_curves", "hidden_states"]
    assert set(keys) == set(built) and set(made) == {"training_curves", "hidden_states"}
    time_unit = system.time_unit
    for key in keys:
        fig = built[key]
        axes = _data_axes(fig)
        assert axes, key
        for ax in axes:
            assert ax.get_ylabel().strip(), (key, "y label")
            assert "(" in ax.get_ylabel() and ")" in ax.get_ylabel(), (key, ax.get_ylabel())
        bottom = axes[-1]
        assert "(" in bottom.get_xlabel() or key == "validity_times", (key, bottom.get_xlabel())
    # state panels carry the system's state units; time axes its time unit
    traces = _data_axes(built["forecast_traces"])
    for ax, name, unit in zip(traces, system.state_names, system.state_units):
        assert ax.get_ylabel() == f"{name} ({unit})"
    dens = _data_axes(built["invariant_densities"])
    for ax, unit in zip(dens, system.state_units):
        assert ax.get_xlabel().endswith(f"({unit})") and ax.get_ylabel() == f"density (1/{unit})"
    assert time_unit in traces[-1].get_xlabel()
    assert time_unit in _data_axes(built["error_growth"])[0].get_xlabel()
    assert time_unit in _data_axes(built["validity_times"])[0].get_ylabel()
    assert time_unit in _data_axes(built["autocorrelation"])[-1].get_xlabel()
    assert time_unit in _data_axes(built["hidden_states"])[-1].get_xlabel()
    assert time_unit in _data_axes(built["training_curves"])[-1].get_ylabel()


def test_every_line_and_box_takes_its_colour_from_the_scheme(small_assessment):
    built, *_ = small_assessment
    scheme = {c.lower() for c in palette.SCHEME_COLOURS}
    for key, fig in built.items():
        for ax in fig.axes:
            for line in ax.lines:
                if isinstance(line, Line2D) and line.get_visible():
                    assert to_hex(line.get_color()).lower() in scheme, (key, line.get_label(), line.get_color())
            for patch in ax.patches:
                if isinstance(patch, (PathPatch, Rectangle)) and patch.get_fill() and patch.get_visible() \
                        and patch is not ax.patch:
                    assert to_hex(patch.get_facecolor()).lower() in scheme, (key, patch)
        # the legend sits outside every data area
        fig.draw_without_rendering()      # lays the figure out, so extents are final
        assert fig.legends, key
        for legend in fig.legends:
            box = legend.get_window_extent()
            for ax in _data_axes(fig):
                assert not box.overlaps(ax.get_window_extent()), key


def test_forecast_traces_show_the_whole_warm_up_and_mark_censoring(small_assessment):
    built, _, result, _, _ = small_assessment
    fig = built["forecast_traces"]
    ax = _data_axes(fig)[0]
    history = next(l for l in ax.lines if l.get_label() == "warm-up history (observed)")
    x = history.get_xdata()
    assert x[0] == pytest.approx(-result["warm_up"]) and x[-1] == pytest.approx(0.0)
    # a model valid to the horizon gets the censoring mark there
    valid_to_end = [n for n, m in result["models"].items() if m["validity_times"][0] >= result["horizon"] - 1e-9]
    marks = [l for l in ax.lines if l.get_marker() == ">" and len(l.get_xdata()) == 1]
    assert len(marks) == len(valid_to_end)


def test_blown_up_forecast_is_marked_at_its_last_finite_state():
    t = np.linspace(0, 1, 11)
    truth = np.stack([np.sin(t), np.cos(t)], axis=1)
    bad = truth.copy()
    bad[6:] = np.nan                                   # non-finite from the 7th sample on
    styles = figs.model_colours(["physics_only", "memory"])
    fig = figs.forecast_traces_figure(t, truth, {"memory": bad}, ["a", "b"], styles, units=["m", "K"])
    ax = _data_axes(fig)[0]
    x_marks = [l for l in ax.lines if l.get_marker() == "X" and len(l.get_xdata()) == 1]
    assert len(x_marks) == 1 and x_marks[0].get_xdata()[0] == pytest.approx(t[5])
    fig = figs.validity_figure({"memory": np.array([1.0, 1.0, 1.0])}, styles, horizon=1.0, blew_up={"memory": True})
    ax = _data_axes(fig)[0]
    assert "blew up" in ax.get_xticklabels()[0].get_text()
    assert any("3/3 censored" == txt.get_text() for txt in ax.texts)


def test_figures_and_their_numbers_reach_tensorboard(small_assessment):
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    _, _, result, _, out = small_assessment
    acc = EventAccumulator(str(out / "tb"), size_guidance={"scalars": 0, "images": 0})
    acc.Reload()
    images = set(acc.Tags()["images"])
    for key in ("forecast_traces", "error_growth", "validity_times", "invariant_densities", "autocorrelation",
                "training_curves", "hidden_states"):
        assert f"assess/{key}" in images, key
    scalars = set(acc.Tags()["scalars"])
    med = result["models"]["memory"]["validity_time_median"]
    ev = acc.Scalars("assess/validity_times/validity_time_median/memory")
    assert ev[-1].value == pytest.approx(med, rel=1e-6)          # float32 in the event file
    assert "assess/error_growth/median_error/physics_only" in scalars
    assert len(acc.Scalars("assess/error_growth/median_error/physics_only")) > 10


def test_training_curves_are_read_back_point_by_point(small_assessment):
    *_, out = small_assessment
    curves = figs.read_training_curves(out / "tb")
    steps, values = curves["memory"]["train/loss"]
    assert steps.tolist() == [0, 1, 2, 3]
    np.testing.assert_allclose(values, [0.5, 0.2, 0.1, 0.05], rtol=1e-6)   # float32 in the event file
    assert "assess" not in curves
