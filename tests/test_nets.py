"""Networks: shapes, conditioning, gradients, registry errors, determinism, rebuild from `arch`."""
import numpy as np
import pytest
import torch

from distillrun.nets import NETS, build_net
from distillrun.nets.mlp import MAX_FREQ, TimeMLP, fourier_features
from distillrun.nets.unet import SmallUNet

torch.set_num_threads(1)


def _inputs(shape, batch=6, num_classes=0, seed=0):
    g = torch.Generator().manual_seed(seed)
    x = torch.randn((batch,) + tuple(shape), generator=g)
    t = torch.rand(batch, generator=g)
    cond = torch.randint(0, num_classes, (batch,), generator=g) if num_classes else None
    return x, t, cond


@pytest.mark.parametrize("kind,shape,kwargs", [
    ("mlp", (2,), dict(width=32, depth=2)),
    ("mlp", (5,), dict(width=32, depth=1, layer_norm=True)),
    ("unet", (1, 8, 8), dict(base=8)),
    ("unet", (1, 16, 16), dict(base=8, mults=(1, 2, 2))),
    ("unet", (3, 16, 16), dict(base=8)),
])
@pytest.mark.parametrize("num_classes", [0, 4])
def test_output_has_the_input_shape(kind, shape, kwargs, num_classes):
    net = build_net(kind, shape, num_classes=num_classes, **kwargs)
    x, t, cond = _inputs(shape, num_classes=num_classes)
    out = net(x, t, cond)
    assert out.shape == x.shape and out.dtype == torch.float32
    assert torch.isfinite(out).all()


def test_fourier_features_match_numpy():
    # Reference: sin/cos at frequencies numpy.geomspace(1, MAX_FREQ, k) computed directly in numpy.
    t = torch.tensor([0.0, 0.013, 0.5, 1.0])
    got = fourier_features(t, 16).numpy()
    freqs = np.geomspace(1.0, MAX_FREQ, 8)
    angles = t.numpy()[:, None].astype(np.float64) * freqs
    expected = np.concatenate([np.sin(angles), np.cos(angles)], axis=1)
    np.testing.assert_allclose(got, expected, atol=2e-4)  # float32 angles up to 1000 rad


def test_fourier_features_reject_odd_count():
    with pytest.raises(ValueError, match="even number"):
        fourier_features(torch.zeros(2), 7)


@pytest.mark.parametrize("net", [TimeMLP(3, width=32, depth=2, num_classes=3),
                                 SmallUNet(1, 8, base=8, num_classes=3)], ids=["mlp", "unet"])
def test_time_and_class_change_the_output(net):
    shape = (3,) if isinstance(net, TimeMLP) else (1, 8, 8)
    x, t, _ = _inputs(shape, batch=4)
    with torch.no_grad():
        base = net(x, t, torch.zeros(4, dtype=torch.long))
        other_t = net(x, 1.0 - t, torch.zeros(4, dtype=torch.long))
        other_c = net(x, t, torch.ones(4, dtype=torch.long))
        no_class = net(x, t, None)
        reserved = net(x, t, torch.full((4,), 3, dtype=torch.long))
    assert (base - other_t).abs().max() > 1e-4
    assert (base - other_c).abs().max() > 1e-4
    torch.testing.assert_close(no_class, reserved)  # cond=None is the reserved label num_classes


@pytest.mark.parametrize("kind,shape,kwargs", [
    ("mlp", (2,), dict(width=16, depth=2, layer_norm=True)),
    ("unet", (1, 8, 8), dict(base=8)),
])
def test_gradients_reach_every_parameter(kind, shape, kwargs):
    torch.manual_seed(0)
    net = build_net(kind, shape, num_classes=2, **kwargs)
    x, t, cond = _inputs(shape, batch=8, num_classes=2)
    cond[0] = 2  # also exercise the reserved "no class" row
    net(x, t, cond).square().mean().backward()
    for name, p in net.named_parameters():
        assert p.grad is not None, name
        assert torch.isfinite(p.grad).all(), name
        assert p.grad.abs().max() > 0, name


def test_build_net_rejects_unknown_kind():
    with pytest.raises(ValueError, match="'transformer' is unknown; valid: mlp, unet"):
        build_net("transformer", (2,))


@pytest.mark.parametrize("kind,shape,match", [
    ("mlp", (1, 8, 8), "vector data of shape"),
    ("unet", (2,), "square images"),
    ("unet", (1, 8, 16), "square images"),
    ("unet", (1, 10, 10), "divisible by 2\\*\\*len\\(mults\\) = 4"),
])
def test_build_net_rejects_wrong_data_shape(kind, shape, match):
    with pytest.raises(ValueError, match=match):
        build_net(kind, shape)


@pytest.mark.parametrize("kind,shape,kwargs", [("mlp", (2,), dict(width=16)), ("unet", (1, 8, 8), dict(base=8))])
def test_same_seed_same_network_and_rebuild_from_arch(kind, shape, kwargs):
    torch.manual_seed(3)
    a = build_net(kind, shape, num_classes=2, **kwargs)
    torch.manual_seed(3)
    b = build_net(kind, shape, num_classes=2, **kwargs)
    torch.manual_seed(4)
    c = build_net(kind, shape, num_classes=2, **kwargs)
    x, t, cond = _inputs(shape, num_classes=2)
    with torch.no_grad():
        torch.testing.assert_close(a(x, t, cond), b(x, t, cond), rtol=0, atol=0)
        assert (a(x, t, cond) - c(x, t, cond)).abs().max() > 1e-4
        rebuilt = NETS[kind](**a.arch)  # what a checkpoint does: class from kind, kwargs from arch
        rebuilt.load_state_dict(a.state_dict())
        torch.testing.assert_close(rebuilt(x, t, cond), a(x, t, cond), rtol=0, atol=0)


@pytest.mark.parametrize("kind,classes,labelled", [("mlp", 0, False), ("mlp", 3, False), ("mlp", 3, True),
                                                   ("unet", 0, False), ("unet", 3, True)])
def test_a_shared_time_is_embedded_once_with_the_same_output(kind, classes, labelled):
    # Samplers pass one time for every row as a stride-0 expanded tensor (denoiser.as_batch_times); the nets
    # then embed it once and broadcast. Reference: the same net on a contiguous copy of the times.
    torch.manual_seed(0)
    net = TimeMLP(2, width=32, depth=2, num_classes=classes) if kind == "mlp" else \
        SmallUNet(channels=1, image_size=8, base=8, num_classes=classes)
    x = torch.randn(5, 2) if kind == "mlp" else torch.randn(5, 1, 8, 8)
    cond = torch.tensor([0, 1, 2, 3, 0]) if labelled else None
    shared = torch.tensor(0.3).expand(5)
    rows = []
    hook = net.embed.time_mlp.register_forward_hook(lambda m, i, o: rows.append(i[0].shape[0]))
    with torch.no_grad():
        got = net(x, shared, cond)
        want = net(x, shared.contiguous(), cond)
    hook.remove()
    assert rows == [1, 5]
    assert got.shape == want.shape
    torch.testing.assert_close(got, want, rtol=1e-5, atol=1e-6)
