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


def torch_clipped(gradient: np.ndarray, max_norm: float) -> np.ndarray:
    """The gradient after torch.nn.utils.clip_grad_norm_ (reference library), in float64."""
    tensor = torch.zeros(gradient.size, dtype=torch.float64, requires_grad=True)
    tensor.grad = torch.tensor(gradient, dtype=torch.float64)
    torch.nn.utils.clip_grad_norm_([tensor], max_norm)
    return tensor.grad.numpy()


# clip_grad_norm_ scales by max_norm / (norm + 1e-6) (PyTorch 2.13 source,
# torch/nn/utils/clip_grad.py), we by max_norm / norm: the two differ by the
# factor 1 + 1e-6 / norm, not by rounding (float64 on both sides). So a clipped
# gradient agrees to a relative 1e-6 / norm and no closer (30 -> 2.99999994 at
# norm 50); an unclipped one is the same bits (its factor is 1 on both sides).
TORCH_CLIP_EPSILON = 1e-6


@pytest.mark.parametrize("gradient", [[30.0, 40.0], [0.3, 0.4], [-7.0, 0.5, 12.0, 3.25]])
def test_clipping_matches_torch_clip_grad_norm(gradient):
    """Reference library: torch.nn.utils.clip_grad_norm_ (max_norm 5, the L2 norm)."""
    gradient = np.array(gradient)
    norm = float(np.linalg.norm(gradient))
    opt = SGD(gradient.size, training(learning_rate=1.0, momentum=0.0, l2=0.0, clip_norm=5.0))
    opt.grad[:] = gradient
    opt.step_()  # learning rate 1 from zero weights: the weights are minus the step
    ours, theirs = -opt.params, torch_clipped(gradient, 5.0)
    if norm <= 5.0:
        assert np.array_equal(ours, theirs)
    else:
        np.testing.assert_allclose(ours, theirs, rtol=1.01 * TORCH_CLIP_EPSILON / norm, atol=0)
        assert np.linalg.norm(ours) == pytest.approx(5.0, rel=1e-15)
        assert not np.array_equal(ours, theirs)  # the tolerance above is the epsilon's


def test_clipping_rescales_the_gradient_to_the_norm_limit():
    """Our rule exactly, the 3-4-5 triangle by hand: norm 50 clipped to 5 is a tenth."""
    opt = SGD(2, training(learning_rate=1.0, momentum=0.0, l2=0.0, clip_norm=5.0))
    opt.grad[:] = [30.0, 40.0]  # norm 50
    opt.step_()
    np.testing.assert_allclose(opt.params, [-3.0, -4.0], rtol=1e-15)
    opt.grad[:] = [0.3, 0.4]  # within the limit: untouched
    opt.step_()
    np.testing.assert_allclose(opt.params, [-3.3, -4.4], rtol=1e-15)


def test_inverse_power_divides_the_rate_by_t_to_the_decay_exponent():
    opt = SGD(1, training(learning_rate=0.5, momentum=0.0, l2=0.0,
                          lr_schedule="inverse_power", decay_exponent=0.5, clip_norm=None))
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


def swapping_steps(opt, grads):
    """Steps the online trainer's way, in a run (SGD moves the weights between two
    rows); returns the weights after each step."""
    step, row = opt.begin_run()
    seen = []
    try:
        for g in grads:
            opt.grad[:] = g
            row = step(1.0)
            seen.append(opt.weight_rows[row].copy())
    finally:
        opt.end_run()
    return seen


@pytest.mark.parametrize("nesterov", [False, True])
@pytest.mark.parametrize("schedule", ["constant", "inverse_power"])
@pytest.mark.parametrize("clip", [None, 0.5])
def test_swapping_steps_equal_plain_steps_and_torch(nesterov, schedule, clip):
    """One matrix product for (v', w') against step_ and against torch.optim.SGD
    (reference library; equal to rounding: w' is summed in another order)."""
    rng = np.random.default_rng(4)
    w0, grads = rng.normal(size=9), rng.normal(size=(7, 9))
    settings = training(learning_rate=0.1, momentum=0.9, nesterov=nesterov, l2=0.01,
                        clip_norm=clip, lr_schedule=schedule)
    plain, swapping = SGD(9, settings), SGD(9, settings)
    plain.params[:] = swapping.params[:] = w0
    for g in grads[:3]:  # begin the swapping run at an odd step count as well
        plain.grad[:] = swapping.grad[:] = g
        plain.step_()
        swapping.step_()
    for start in (3, 4, 6):  # runs of 1, 2 and 1 steps
        stop = start + (2 if start == 4 else 1)
        for g in grads[start:stop]:
            plain.grad[:] = g
            plain.step_()
        swapping_steps(swapping, grads[start:stop])
        np.testing.assert_allclose(swapping.params, plain.params, rtol=1e-13, atol=1e-15)
        np.testing.assert_allclose(swapping.velocity, plain.velocity, rtol=1e-12, atol=1e-15)
        assert swapping.step_count == plain.step_count
    if clip is None and schedule == "constant":
        tw = torch.tensor(w0, requires_grad=True)
        topt = torch.optim.SGD([tw], lr=0.1, momentum=0.9, nesterov=nesterov,
                               weight_decay=0.01)
        for g in grads:
            tw.grad = torch.tensor(g)
            topt.step()
        np.testing.assert_allclose(swapping.params, tw.detach().numpy(), rtol=1e-12,
                                   atol=1e-14)


@pytest.mark.parametrize("nesterov", [False, True])
@pytest.mark.parametrize("bad", ["nan", "inf", "overflow"])
def test_a_non_finite_swapping_step_raises_and_changes_nothing(nesterov, bad):
    opt = SGD(4, training(learning_rate=1.0, momentum=0.5, l2=2.0, clip_norm=None,
                          nesterov=nesterov))
    opt.params[:] = [1.0, 2.0, 3.0, 4.0]
    swapping_steps(opt, [np.array([0.1, 0.2, 0.3, 0.4])])
    if bad == "overflow":  # the weight-decay term alone overflows (see above)
        opt.params[0] = 1.5e308
        opt.params_changed()
    state = {k: v.copy() for k, v in opt.state_arrays().items()}
    params, steps = opt.params.copy(), opt.step_count
    gradient = {"nan": [0.1, np.nan, 0.3, 0.4], "inf": [0.1, np.inf, 0.3, 0.4],
                "overflow": [0.1, 0.2, 0.3, 0.4]}[bad]
    with np.errstate(over="ignore", invalid="ignore"), pytest.raises(NonFiniteError):
        swapping_steps(opt, [np.array(gradient)])
    assert np.array_equal(opt.params, params) and opt.step_count == steps
    for name, value in opt.state_arrays().items():
        assert np.array_equal(value, state[name])
    # And the next good step goes on from there as if the bad one never came.
    reference = SGD(4, training(learning_rate=1.0, momentum=0.5, l2=2.0, clip_norm=None,
                                nesterov=nesterov))
    reference.params[:] = params
    reference.load_state(state, steps)
    if bad != "overflow":
        swapping_steps(opt, [np.array([0.3, 0.1, 0.2, 0.0])])
        swapping_steps(reference, [np.array([0.3, 0.1, 0.2, 0.0])])
        assert np.array_equal(opt.params, reference.params)


@pytest.mark.parametrize("kind", ["sgd", "adam"])
def test_a_run_of_steps_leaves_the_weights_in_params_and_continues_plain_steps(kind):
    """Whatever rows an optimizer uses during a run, end_run puts the weights back in
    `params`, and plain steps and runs interleave (Adam's run is its plain step)."""
    rng = np.random.default_rng(5)
    grads = rng.normal(size=(9, 6))
    settings = training(optimizer=kind, nesterov=True)
    runs, plain = make_optimizer(6, settings), make_optimizer(6, settings)
    runs.params[:] = plain.params[:] = rng.normal(size=6)
    for start, stop in ((0, 3), (3, 4), (4, 9)):
        seen = swapping_steps(runs, grads[start:stop])
        for g in grads[start:stop]:
            plain.grad[:] = g
            assert plain.step_() == 0
        np.testing.assert_allclose(runs.params, plain.params, rtol=1e-13, atol=1e-15)
        assert np.array_equal(seen[-1], runs.params)
    if kind == "adam":
        assert np.array_equal(runs.params, plain.params)
        assert len(runs.weight_rows) == 1 and runs.weight_rows[0] is runs.params
