"""MC dropout and last-layer Laplace on convolutional networks and other non-foldable modules.

References: a per-mask torch loop (each member = the trained module with its dropout
layers replaced by the drawn masks through forward hooks) and, for Laplace, the Hessian
of the head's negative log posterior by torch.autograd.functional.hessian (MacKay 1992;
Daxberger et al. 2021, "Laplace Redux", last-layer Laplace: only the last Linear layer
is Gaussian; for softmax cross-entropy its Hessian equals the GGN, logits being linear in it).
"""
import pytest
import torch
from torch import nn
from torch.autograd.functional import hessian
from torch.nn import functional as F

import jostle
from jostle.fitting.dropout import fold_dropout_masks, sample_dropout

# float32 eps (1.2e-7) x the longest reduction (a 16 x 9 convolution sum, a 294-wide
# head), for logits of order 1: 1e-4 bounds the difference of two summation orders.
ATOL = 1e-4


@pytest.fixture(scope="module", params=[False, True], ids=["grey", "rgb"])
def cards(request):
    return jostle.datasets.meter_cards(resolution=28, colour=request.param)


def _loop_logits(module, masks, x):
    """Member s: ``module`` in eval mode with dropout layer k's output replaced by input * mask / (1 - p)."""
    layers = [layer for layer in module.modules() if isinstance(layer, (nn.Dropout, nn.Dropout2d)) and layer.p > 0]
    out = []
    for s in range(masks[0].shape[0]):
        hooks = [layer.register_forward_hook(
            lambda layer, inputs, output, keep=mask[s]: inputs[0] * keep / (1 - layer.p))
            for layer, mask in zip(layers, masks)]
        with torch.no_grad():
            out.append(module.eval()(x))
        for hook in hooks:
            hook.remove()
    return torch.stack(out)


def _random_masks(shapes, members, p, seed):
    g = torch.Generator().manual_seed(seed)
    return [(torch.rand(members, *shape, generator=g) >= p).float() for shape in shapes]


def test_dropout_masks_after_convolutions_equal_a_per_mask_loop(cards):
    channels, height = cards.image_shape[0], cards.image_shape[1]
    net = jostle.init_parameters(jostle.cnn(cards.image_shape, 10, channels=(4, 6), hidden=(8,), dropout=0.25),
                                 torch.Generator().manual_seed(0))
    shapes = [(4, height // 2, height // 2), (6, height // 4, height // 4), (8,)]
    masks = _random_masks(shapes, 5, 0.25, seed=1)
    ens = fold_dropout_masks(net, masks)
    assert type(ens._plan).__name__ == "ConvPlan" and channels in (1, 3)
    x = cards.x_test[:20]
    reference = _loop_logits(net, masks, x)
    torch.testing.assert_close(ens.logits(x), reference, atol=ATOL, rtol=0)
    torch.testing.assert_close(ens.predict(x).probs, torch.softmax(reference, -1).mean(0), atol=ATOL, rtol=0)
    with pytest.raises(ValueError, match=r"masks\[1\] must have shape \(S, 6, 7, 7\) with S shared by all masks"):
        fold_dropout_masks(net, [masks[0], masks[0], masks[2]])


def test_channel_dropout_and_dropout_before_an_activation_take_masks_as_input():
    g = torch.Generator().manual_seed(2)
    conv = jostle.init_parameters(nn.Sequential(
        jostle.posterior.architectures.ImageView((2, 8, 8)), nn.Conv2d(2, 3, 3, padding=1), nn.ReLU(),
        nn.Dropout2d(0.5), nn.MaxPool2d(2), nn.Flatten(), nn.Linear(48, 3)), g)
    masks = _random_masks([(3, 1, 1)], 6, 0.5, seed=3)
    x = torch.rand(7, 128, generator=g)
    torch.testing.assert_close(fold_dropout_masks(conv, masks).logits(x), _loop_logits(conv, masks, x),
                               atol=ATOL, rtol=0)
    # Dropout followed by Tanh: nothing to fold into, so masks are a forward input
    mlp = jostle.init_parameters(nn.Sequential(nn.Linear(4, 6), nn.Dropout(0.3), nn.Tanh(), nn.Linear(6, 3)), g)
    masks = _random_masks([(6,)], 4, 0.3, seed=4)
    x = torch.rand(9, 4, generator=g)
    torch.testing.assert_close(fold_dropout_masks(mlp, masks).logits(x), _loop_logits(mlp, masks, x),
                               atol=1e-5, rtol=0)  # 6-term sums in float32
    drawn = sample_dropout(mlp, samples=3, seed=5)
    assert len(drawn) == 3 and torch.equal(drawn.params["0.weight"][0], mlp[0].weight)  # a copy: exact


def test_fit_dropout_on_a_cnn_saves_loads_and_draws_masks_at_the_rate(cards, tmp_path):
    net = jostle.cnn(cards.image_shape, 10, channels=(4, 8), dropout=0.2)
    ens = jostle.fit_dropout(net, cards, samples=40, epochs=1, batch_size=128, progress=False, seed=0)
    assert ens.meta["masks"] == "forward input" and ens.meta["p"] == [0.2, 0.2]
    keep = ens.params["4.keep"]  # the first block's dropout: [40, 4, 14, 14]
    assert keep.shape == (40, 4, 14, 14)
    # Bernoulli(0.8) over 31,360 units: 5 standard deviations is 0.011
    assert abs(float(keep.mean()) - 0.8) < 5 * (0.8 * 0.2 / keep.numel()) ** 0.5
    assert torch.equal(ens.params["1.weight"][0], ens.params["1.weight"][-1])  # one trained body, copied
    ens.save(tmp_path / "dropout.safetensors")
    loaded = jostle.load(tmp_path / "dropout.safetensors")
    x = cards.x_test[:6]
    assert torch.equal(loaded.logits(x), ens.logits(x))  # same kernels, same inputs: exact
    assert ens.predict(x).epistemic.max() > 0  # the masks make members disagree


def test_last_layer_laplace_on_a_cnn_matches_the_autograd_hessian(cards):
    net = jostle.cnn(cards.image_shape, 10, channels=(4,), hidden=(6,))
    ens = jostle.fit_laplace(net, cards, samples=5, prior_precision=2.0, epochs=1, batch_size=128,
                             progress=False, seed=0)
    posterior = ens.posterior
    member = posterior.point.module(0).eval()
    with torch.no_grad():
        features = nn.Sequential(*list(member)[:-1])(cards.x_train).double()
    head = member[-1]
    theta = torch.cat([head.weight, head.bias.unsqueeze(1)], 1).detach().double().flatten()
    labels = cards.y_train

    def negative_log_posterior(flat):
        rows = flat.reshape(10, -1)
        logits = features @ rows[:, :-1].T + rows[:, -1]
        return F.cross_entropy(logits, labels, reduction="sum") + 0.5 * 2.0 * (flat ** 2).sum()

    reference = hessian(negative_log_posterior, theta)
    torch.testing.assert_close(posterior.mean, theta, atol=0, rtol=0)  # float32 -> float64: exact
    # The features are float32 (eps 1.2e-7) and jostle reads them in chunks of 1,024 points,
    # where the convolution may round differently than on all 1,258 at once: 1e-6 relative
    # to the largest entry (the float64 sums themselves agree to ~1e-13).
    scale = float(reference.abs().max())
    torch.testing.assert_close(posterior.precision, reference, atol=1e-6 * scale, rtol=0)
    covariance = torch.linalg.inv(reference)
    # inversion amplifies the relative error by at most the condition number
    condition = float(torch.linalg.cond(reference))
    torch.testing.assert_close(posterior.covariance, covariance, atol=1e-6 * condition * float(covariance.abs().max()),
                               rtol=0)
    for name in ens.params:  # the body is shared: only the head (layer 7) varies
        varies = not torch.equal(ens.params[name][0], ens.params[name][1])
        assert varies == name.startswith("7."), name


def test_laplace_takes_any_module_whose_output_is_its_last_linear(cards):
    class Net(nn.Module):
        def __init__(self, doubled=False):
            super().__init__()
            self.body = jostle.cnn(cards.image_shape, 6, channels=(2,))
            self.head = nn.Linear(6, 10)
            self.doubled = doubled

        def forward(self, x):
            out = self.head(torch.tanh(self.body(x)))
            return out * 2 if self.doubled else out

    ens = jostle.fit_laplace(Net(), cards, samples=3, prior_precision=1.0, epochs=1, batch_size=256, progress=False)
    assert ens.posterior.mean.shape == (10 * 7,)
    with pytest.raises(ValueError, match=r"module must output its last nn.Linear layer's \('head'\) output"):
        jostle.fit_laplace(Net(doubled=True), cards, samples=3, prior_precision=1.0, epochs=1, batch_size=256,
                           progress=False)
