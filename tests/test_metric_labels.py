"""Labels of the numbers mnemode reports: every fitter's errors are explained, and the regression
label's reading (0 perfect, 1 no better than the mean) is what the error computes.
"""

from __future__ import annotations

import inspect

import numpy as np
import torch
from sklearn.metrics import r2_score

import mnemode.fitting as fitting
from mnemode.fitting.regression import relative_error
from mnemode.metric_labels import FIT_ERRORS, fit_error_label, metrics_labels


def test_every_shipped_fitter_has_labelled_errors():
    fitters = [name for name, obj in vars(fitting).items()
               if inspect.isclass(obj) and issubclass(obj, fitting.Fitter) and not inspect.isabstract(obj)]
    assert set(fitters) == set(FIT_ERRORS)
    for name in fitters:
        train, val = fit_error_label(name, "train_error"), fit_error_label(name, "val_error")
        assert train.what and train.unit and val.what and val.unit and train != val


def test_relative_rms_error_reads_as_the_label_says():
    # scikit-learn's variance-weighted R² is 1 − Σ SS_res / Σ SS_tot over outputs, so the relative
    # RMS error the regression fitters report must equal sqrt(1 − R²): 0 perfect, 1 for the mean.
    rng = np.random.default_rng(0)
    y = rng.normal(size=(200, 3)) * [1.0, 5.0, 0.2]
    pred = y + rng.normal(scale=0.3, size=y.shape)
    expected = np.sqrt(1.0 - r2_score(y, pred, multioutput="variance_weighted"))
    assert abs(relative_error(torch.as_tensor(pred), torch.as_tensor(y)) - expected) < 1e-12
    mean_pred = np.broadcast_to(y.mean(0), y.shape).copy()
    assert abs(relative_error(torch.as_tensor(mean_pred), torch.as_tensor(y)) - 1.0) < 1e-12
    assert "0: perfect; 1: no better than their mean" in fit_error_label("DerivativeFit").what


def test_a_fitters_own_label_wins_and_unknown_fitters_say_so():
    own = {"train_error_label": "negative log likelihood per point", "train_error_unit": "nats"}
    label = fit_error_label("TrajectoryFit", "train_error", own)
    assert (label.what, label.unit) == ("negative log likelihood per point", "nats")
    assert "as defined by MyFit" in fit_error_label("MyFit").what
    section = metrics_labels({"m": {"fitter": "ReadoutRidgeFit"}})
    assert section["fit"]["m"]["train_error"]["unit"] == "ratio"
    assert section["assessment"]["kl_invariant"]["unit"] == "nats"
