"""The same weights give PyTorch's outputs (to 1e-12) and autograd's parameter and
input gradients (to 1e-10). Reference library: PyTorch (CPU wheel, torch==2.13.0)."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
import torch

from engine.network import Network

TORCH_ACTIVATION = {"tanh": torch.tanh, "logistic": torch.sigmoid, "relu": torch.relu}
HEADS = [("logistic", "cross_entropy", 1), ("logistic", "squared_error", 1),
         ("softmax", "cross_entropy", 4), ("identity", "squared_error", 1)]
HIDDEN = {0: (), 1: (7,), 2: (7, 6), 3: (7, 6, 5)}


def torch_forward(net: Network, X: torch.Tensor, params: list[torch.Tensor]):
    a = X
    for i in range(len(net.weights)):
        z = a @ params[2 * i] + params[2 * i + 1]
        a = TORCH_ACTIVATION[net.activation](z) if i < len(net.weights) - 1 else z
    return a  # logits


def torch_head(output: str, z: torch.Tensor) -> torch.Tensor:
    if output == "logistic":
        return torch.sigmoid(z)
    if output == "softmax":
        return torch.softmax(z, dim=1)
    return z


def torch_loss(output: str, loss: str, z: torch.Tensor, y: np.ndarray) -> torch.Tensor:
    if output == "logistic" and loss == "cross_entropy":
        return torch.nn.functional.binary_cross_entropy_with_logits(
            z[:, 0], torch.tensor(y, dtype=torch.float64))
    if output == "logistic":
        return 0.5 * ((torch.sigmoid(z[:, 0]) - torch.tensor(y, dtype=torch.float64)) ** 2).mean()
    if output == "softmax":
        return torch.nn.functional.cross_entropy(z, torch.tensor(y))
    return 0.5 * ((z[:, 0] - torch.tensor(y)) ** 2).mean()


def setup(activation, output, k, depth, seed):
    rng = np.random.default_rng(seed)
    net = Network.create((6, *HIDDEN[depth], k), activation, output, rng)
    net.params += rng.normal(scale=0.2, size=net.params.size)
    X = rng.normal(size=(9, 6))
    y = rng.normal(size=9) if output == "identity" else rng.integers(0, max(k, 2), size=9)
    params = []
    for w, b in zip(net.weights, net.biases, strict=True):
        params += [torch.tensor(w.copy(), requires_grad=True),
                   torch.tensor(b.copy(), requires_grad=True)]
    return net, X, y, params


CASES = list(itertools.product(["tanh", "logistic", "relu"], HEADS, HIDDEN))


@pytest.mark.parametrize(("activation", "head", "depth"), CASES)
def test_outputs_and_parameter_gradients_match_torch_autograd(activation, head, depth):
    output, loss, k = head
    net, X, y, params = setup(activation, output, k, depth, seed=depth + 20)
    z = torch_forward(net, torch.tensor(X), params)
    np.testing.assert_allclose(net.forward(X), torch_head(output, z).detach().numpy(),
                               rtol=0, atol=1e-12)
    value = torch_loss(output, loss, z, y)
    value.backward()
    ours_loss, grad = net.loss_gradient(X, y, loss)
    assert ours_loss == pytest.approx(value.item(), rel=1e-12, abs=1e-14)
    expected = np.concatenate([
        np.concatenate([params[2 * i].grad.numpy(), params[2 * i + 1].grad.numpy()[None, :]])
        .ravel() for i in range(len(net.weights))])
    np.testing.assert_allclose(grad, expected, rtol=0, atol=1e-10)


@pytest.mark.parametrize(("activation", "head", "depth"), CASES)
@pytest.mark.parametrize("of", ["output", "logit"])
def test_input_gradients_match_torch_autograd(activation, head, depth, of):
    output, _, k = head
    net, X, _, params = setup(activation, output, k, depth, seed=depth + 40)
    for index in range(k):
        tX = torch.tensor(X, requires_grad=True)
        z = torch_forward(net, tX, params)
        f = torch_head(output, z) if of == "output" else z
        f[:, index].sum().backward()  # rows are independent: sum gives each row's gradient
        np.testing.assert_allclose(net.input_gradient(X, index, of=of), tX.grad.numpy(),
                                   rtol=0, atol=1e-10)
