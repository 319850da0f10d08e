"""Optimizers: SGD (momentum, Nesterov), Adam, L2, clipping, schedules, atomic steps."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch

from engine.errors import NonFiniteError, SnapshotError
from engine.optimizers import SGD, Adam, make_optimizer
from engine.spec import TRAINING_DEFAULTS


def training(**overrides):
    return {**TRAINING_DEFAULTS, **overrides}


def test_adam_first_step_moves_each_parameter_by_about_the_learning_rate():
    """Kingma & Ba (ICLR 2015), section 2.1: |step_1| ~= alpha for |g| >> epsilon."""
    opt = Adam(5, training(optimizer="adam", learning_rate=0.001, l2=0.0, clip_norm=None))
    opt.params[:] = [1.0, -2.0, 0.5, 3.0, 0.0]
    start = opt.params.copy()
    opt.grad[:] = [0.3, -4.0, 1e-3, 100.0, -0.02]
    opt.step_()
    np.testing.assert_allclose(np.abs(opt.params - start), 0.001, rtol=1e-4)
    assert np.all(np.sign(start - opt.params) == np.sign([0.3, -4.0, 1e-3, 100.0, -0.02]))


@pytest.mark.parametrize("nesterov", [False, True])
@pytest.mark.parametrize("l2", [0.0, 0.01])
def test_sgd_matches_torch_sgd_with_momentum_and_weight_decay(nesterov, l2):
    """Reference library: PyTorch torch.optim.SGD (weight_decay adds l2 * w to the
    gradient; its momentum buffer b = mu b + g' with w -= lr b equals our v = -lr b)."""
    rng = np.random.default_rng(0)
    w0 = rng.normal(size=7)
    grads = rng.normal(size=(6, 7))
    opt = SGD(7, training(learning_rate=0.1, momentum=0.9, nesterov=nesterov, l2=l2,
                          clip_norm=None))
    opt.params[:] = w0
    tw = torch.tensor(w0, requires_grad=True)
    topt = torch.optim.SGD([tw], lr=0.1, momentum=0.9, nesterov=nesterov, weight_decay=l2)
    for g in grads:
        opt.grad[:] = g
        opt.step_()
        tw.grad = torch.tensor(g)
        topt.step()
    np.testing.assert_allclose(opt.params, tw.detach().numpy(), rtol=1e-12, atol=1e-14)


def test_adam_matches_torch_adam():
    """Reference library: PyTorch torch.optim.Adam with the paper's defaults."""
    rng = np.random.default_rng(1)
    w0 = rng.normal(size=9)
    opt = Adam(9, training(optimizer="adam", learning_rate=0.01, l2=0.001, clip_norm=None))
    opt.params[:] = w0
    tw = torch.tensor(w0, requires_grad=True)
    topt = torch.optim.Adam([tw], lr=0.01, betas=(0.9, 0.999), eps=1e-8, weight_decay=0.001)
    for g in rng.normal(size=(20, 9)):
        opt.grad[:] = g
        opt.step_()
        tw.grad = torch.tensor(g)
        topt.step()
    np.testing.assert_allclose(opt.params, tw.detach().numpy(), rtol=1e-12, atol=1e-14)


def test_clipping_rescales_the_gradient_to_the_norm_limit():
    """Gradient-norm clipping as torch.nn.utils.clip_grad_norm_ (reference library)."""
    opt = SGD(2, training(learning_rate=1.0, momentum=0.0, l2=0.0, clip_norm=5.0))
    opt.grad[:] = [30.0, 40.0]  # norm 50
    opt.step_()
    np.testing.assert_allclose(opt.params, [-3.0, -4.0], rtol=1e-15)
    opt.grad[:] = [0.3, 0.4]  # within the limit: untouched
    opt.step_()
    np.testing.assert_allclose(opt.params, [-3.3, -4.4], rtol=1e-15)


def test_invscaling_divides_the_rate_by_t_to_the_power_t():
    opt = SGD(1, training(learning_rate=0.5, momentum=0.0, l2=0.0,
                          lr_schedule="invscaling", power_t=0.5, clip_norm=None))
    rates = []
    for _ in range(4):
        rates.append(opt.rate())
        opt.grad[:] = 1.0
        opt.step_()
    np.testing.assert_allclose(rates, [0.5 / math.sqrt(t) for t in (1, 2, 3, 4)])
    assert opt.params[0] == pytest.approx(-sum(rates))


@pytest.mark.parametrize("kind", ["sgd", "adam"])
@pytest.mark.parametrize("bad", [np.nan, np.inf, 1e200])
def test_a_non_finite_step_raises_and_changes_nothing(kind, bad):
    opt = make_optimizer(4, training(optimizer=kind, clip_norm=None))
    opt.params[:] = [1.0, 2.0, 3.0, 4.0]
    opt.grad[:] = [0.1, 0.2, 0.3, 0.4]
    opt.step_()
    state = {k: v.copy() for k, v in opt.state_arrays().items()}
    params, steps = opt.params.copy(), opt.step_count
    opt.grad[:] = [0.1, bad, 0.3, 0.4]
    with np.errstate(over="ignore", invalid="ignore"), pytest.raises(NonFiniteError):
        opt.step_()
    assert np.array_equal(opt.params, params) and opt.step_count == steps
    for name, value in opt.state_arrays().items():
        assert np.array_equal(value, state[name])


@pytest.mark.parametrize("kind", ["sgd", "adam"])
@pytest.mark.parametrize("nesterov", [False, True])
def test_state_round_trip_continues_bit_identically(kind, nesterov):
    rng = np.random.default_rng(2)
    grads = rng.normal(size=(7, 6))
    settings = training(optimizer=kind, nesterov=nesterov)
    a = make_optimizer(6, settings)
    for g in grads[:3]:
        a.grad[:] = g
        a.step_()
    b = make_optimizer(6, settings)
    b.params[:] = a.params
    b.load_state({k: v.copy() for k, v in a.state_arrays().items()}, a.step_count)
    for g in grads[3:]:
        for opt in (a, b):
            opt.grad[:] = g
            opt.step_()
    assert np.array_equal(a.params, b.params)


def test_load_state_refuses_wrong_shapes_and_non_finite_values():
    opt = make_optimizer(3, training())
    with pytest.raises(SnapshotError):
        opt.load_state({"velocity": np.zeros(4)}, 0)
    with pytest.raises(SnapshotError):
        opt.load_state({"velocity": np.array([0.0, np.nan, 0.0])}, 0)
    with pytest.raises(SnapshotError):
        opt.load_state({}, 0)


@pytest.mark.parametrize("nesterov", [False, True])
def test_an_overflowing_update_from_finite_gradients_is_caught(nesterov):
    """The weight-decay term overflows on its own: -lr * l2 * w with w near the float64
    maximum. SGD skips its dot-product check only while its bounds prove finiteness."""
    opt = SGD(3, training(learning_rate=1.0, momentum=0.5, l2=2.0, clip_norm=None,
                          nesterov=nesterov))
    opt.params[:] = [1.5e308, -1.0, 2.0]
    opt.grad[:] = [0.1, 0.2, 0.3]
    with np.errstate(over="ignore", invalid="ignore"), pytest.raises(NonFiniteError):
        opt.step_()
    assert opt.params.tolist() == [1.5e308, -1.0, 2.0] and opt.step_count == 0


def test_large_but_finite_weights_still_step_exactly():
    opt = SGD(2, training(learning_rate=0.5, momentum=0.0, l2=0.0, clip_norm=None))
    opt.params[:] = [1e200, 3.0]
    opt.grad[:] = [2.0, 4.0]
    opt.step_()
    assert opt.params.tolist() == [1e200 - 1.0, 1.0]
    opt.params_changed()
    opt.params[:] = [1.0, 1.0]
    opt.grad[:] = [2.0, 4.0]
    opt.step_()
    assert opt.params.tolist() == [0.0, -1.0]
