"""Adapter students (distillrun.adapters): low-rank weight changes on a frozen teacher.

References named beside each check: Hu et al. 2021 (LoRA: W0 + BA with B = 0 at the start, Sec. 4.1; merging
BA into W0 for inference, Sec. 4.1); numpy.linalg.lstsq (the unconstrained least-squares weight a full-rank
adapter must reach); the Eckart-Young-Mirsky theorem (best rank-k approximation error in Frobenius norm is the
root sum of the discarded squared singular values; Eckart & Young 1936).
"""
from __future__ import annotations

import copy

import numpy as np
import pytest
import torch
from torch import nn
from torch.nn import functional as F

from distillrun import adapters as A
from distillrun.denoiser import NetDenoiser
from distillrun.nets import build_net
from distillrun.samplers import sample, uniform_grid
from distillrun.schedule import Schedule


def mlp(seed=0, width=32, depth=2):
    torch.manual_seed(seed)
    return build_net("mlp", (2,), 0, width=width, depth=depth)


def unet(seed=0):
    torch.manual_seed(seed)
    return build_net("unet", (1, 8, 8), 0, base=8, mults=[1, 2])


def randomize(net, seed=1, size=0.05):
    """Non-zero factors, as after training."""
    g = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for p in A.adapted(net).values():
            p.factor_out.copy_(torch.randn(p.factor_out.shape, generator=g) * size)
            p.factor_in.copy_(torch.randn(p.factor_in.shape, generator=g))
    return net


def inputs(net, n=16, seed=3):
    g = torch.Generator().manual_seed(seed)
    shape = (n, 2) if isinstance(net, nn.Module) and hasattr(net, "inp") else (n, 1, 8, 8)
    return torch.randn(shape, generator=g), torch.rand(n, generator=g)


# ---------------------------------------------------------------------------------- zero init = teacher
@pytest.mark.parametrize("make,layout", [(mlp, None), (unet, None), (unet, torch.channels_last)])
def test_zero_initialised_adapter_equals_teacher_bit_for_bit(make, layout):
    """B = 0 at the start makes W0 + BA = W0 (Hu et al. 2021, Sec. 4.1): outputs identical, not just close."""
    teacher = make()
    student = copy.deepcopy(teacher)
    names = A.attach(student, A.AdapterSpec(rank=3))
    assert names == list(A.candidate_layers(teacher))  # '*' takes every Linear and Conv2d
    if layout is not None:
        teacher, student = teacher.to(memory_format=layout), student.to(memory_format=layout)
    x, t = inputs(teacher)
    with torch.no_grad():
        assert torch.equal(student(x, t), teacher(x, t))
    # the factor that multiplies first is not zero: the gradient reaches factor_out at once
    assert all(p.factor_in.abs().sum() > 0 and p.factor_out.abs().sum() == 0 for p in A.adapted(student).values())


def test_only_adapter_factors_and_train_also_parameters_train():
    """The teacher's weights stay frozen: an optimiser step moves only the factors (and train_also)."""
    teacher = mlp()
    student = copy.deepcopy(teacher)
    A.attach(student, A.AdapterSpec(rank=2, layers=["blocks.*.inner", "out"], train_also=["embed.time_mlp.0.bias"]))
    trainable = {n for n, p in student.named_parameters() if p.requires_grad}
    assert trainable == {"blocks.0.inner.parametrizations.weight.0.factor_in",
                         "blocks.0.inner.parametrizations.weight.0.factor_out",
                         "blocks.1.inner.parametrizations.weight.0.factor_in",
                         "blocks.1.inner.parametrizations.weight.0.factor_out",
                         "out.parametrizations.weight.0.factor_in", "out.parametrizations.weight.0.factor_out",
                         "embed.time_mlp.0.bias"}
    # r (out + in) per layer plus the bias (count by hand: width 32, dim 2)
    assert A.trainable_count(student) == 2 * (32 + 32) * 2 + 2 * (2 + 32) + 32
    opt = torch.optim.SGD([p for p in student.parameters() if p.requires_grad], lr=0.1)
    x, t = inputs(student)
    student(x, t).pow(2).sum().backward()
    opt.step()
    after = A.base_state(student)
    for k, v in teacher.state_dict().items():
        assert torch.equal(after[k], v) == (k != "embed.time_mlp.0.bias"), k


# ---------------------------------------------------------------------------------- merge / unmerge
@pytest.mark.parametrize("make", [mlp, unet])
def test_merge_then_unmerge_restores_teacher_weights_exactly(make):
    """Merging writes W0 + BA into the weight (Hu et al. 2021, Sec. 4.1); unmerging gives back W0 bit for bit
    (kept, since (W0 + BA) - BA != W0 in floating point). Merged outputs equal unmerged ones bit for bit."""
    teacher = make()
    student = randomize(copy.deepcopy(teacher).requires_grad_(False))
    A.attach(student, A.AdapterSpec(rank=3))
    randomize(student)
    x, t = inputs(teacher)
    with torch.no_grad():
        live = student(x, t)
        A.merge(student)
        merged = student(x, t)
        stored = {n: m.parametrizations.weight.original.clone() for n, m in student.named_modules()
                  if A._ours(m) is not None}
        A.unmerge(student)
        again = student(x, t)
    assert torch.equal(live, merged) and torch.equal(live, again)
    assert not torch.equal(live, teacher(x, t))  # the adapters do change the output
    for name, w in stored.items():  # the merged weight is W0 + dW
        w0 = teacher.get_submodule(name).weight
        assert not torch.equal(w, w0)
        torch.testing.assert_close(w, w0 + A.adapted(student)[name].delta(), rtol=0, atol=0)
    restored = A.base_state(student)
    assert set(restored) == set(teacher.state_dict())
    assert all(torch.equal(restored[k], v) for k, v in teacher.state_dict().items())
    # merged_copy: a plain network with the teacher's keys, same outputs
    plain = A.merged_copy(student)
    assert not A.adapted(plain) and set(plain.state_dict()) == set(teacher.state_dict())
    fresh = make()
    fresh.load_state_dict(plain.state_dict())
    with torch.no_grad():
        assert torch.equal(fresh(x, t), live)
        assert torch.equal(student(x, t), live)  # the original still works after the copy was made
    assert type(student.get_submodule(next(iter(A.adapted(student))))) is not type(plain.get_submodule(next(iter(A.adapted(student)))))


def test_base_digest_names_the_teacher_through_adapters_and_merging():
    teacher = mlp()
    student = copy.deepcopy(teacher)
    A.attach(student, A.AdapterSpec(rank=2))
    randomize(student)
    d = A.base_digest(teacher)
    assert A.base_digest(student) == d
    A.merge(student)
    assert A.base_digest(student) == d
    other = mlp(seed=5)
    assert A.base_digest(other) != d


# ---------------------------------------------------------------------------------- expressiveness
def _fit(module, x, y, steps=200):
    """Least-squares fit of the adapter factors by L-BFGS (float64)."""
    params = [p for p in module.parameters() if p.requires_grad]
    opt = torch.optim.LBFGS(params, lr=1, max_iter=steps, tolerance_grad=1e-14, tolerance_change=1e-16,
                            history_size=50, line_search_fn="strong_wolfe")

    def closure():
        opt.zero_grad()
        loss = (module(x) - y).pow(2).sum()
        loss.backward()
        return loss
    for _ in range(5):
        opt.step(closure)


@pytest.mark.parametrize("out_f,in_f", [(3, 5), (5, 3)])
def test_full_rank_adapter_reaches_the_least_squares_weight_of_a_linear_layer(out_f, in_f):
    """With rank >= min(out, in) the adapted weight W0 + BA can be any matrix, so fitting the factors to noisy
    data reaches the unconstrained least-squares weight numpy.linalg.lstsq computes. One rank less cannot:
    its weight error is at least the smallest singular value of the needed change (Eckart-Young-Mirsky)."""
    torch.manual_seed(0)
    teacher = nn.Sequential(nn.Linear(in_f, out_f)).double()  # adapters sit on named sub-layers
    g = torch.Generator().manual_seed(1)
    x = torch.randn(64, in_f, generator=g, dtype=torch.float64)
    w_true = torch.randn(out_f, in_f, generator=g, dtype=torch.float64)
    y = x @ w_true.T + teacher[0].bias.detach() + 0.1 * torch.randn(64, out_f, generator=g, dtype=torch.float64)
    w_ls = np.linalg.lstsq(x.numpy(), (y - teacher[0].bias.detach()).numpy(), rcond=None)[0].T  # (out, in)
    need = w_ls - teacher[0].weight.detach().numpy()
    sv = np.linalg.svd(need, compute_uv=False)
    for rank in (min(out_f, in_f), min(out_f, in_f) - 1):
        layer = copy.deepcopy(teacher)
        A.attach(layer, A.AdapterSpec(rank=rank))
        _fit(layer, x, y)
        with torch.no_grad():
            err = np.linalg.norm(layer[0].weight.numpy() - w_ls)
        if rank >= min(out_f, in_f):
            assert err < 1e-6, err
        else:
            # the data term sees the weight through x, so its best rank-limited weight need not be the
            # Frobenius-best; Eckart-Young still bounds any rank-(min-1) change from below
            assert err >= sv[-1] * (1 - 1e-6), (err, sv)


def test_full_rank_adapter_reaches_the_least_squares_weight_of_a_conv_layer():
    """A Conv2d is linear in its weight read as (out, in * kh * kw) against unfolded patches; a rank-min adapter
    on it reaches numpy.linalg.lstsq's weight on those patches."""
    torch.manual_seed(0)
    conv = nn.Sequential(nn.Conv2d(2, 3, 2, bias=False)).double()  # weight (3, 2, 2, 2): matrix 3 x 8, min = 3
    g = torch.Generator().manual_seed(2)
    x = torch.randn(12, 2, 5, 5, generator=g, dtype=torch.float64)
    y = F.conv2d(x, torch.randn(3, 2, 2, 2, generator=g, dtype=torch.float64))
    y = y + 0.05 * torch.randn(y.shape, generator=g, dtype=torch.float64)
    patches = F.unfold(x, 2).transpose(1, 2).reshape(-1, 8)  # (n * L, in * kh * kw)
    targets = y.flatten(2).transpose(1, 2).reshape(-1, 3)
    w_ls = np.linalg.lstsq(patches.numpy(), targets.numpy(), rcond=None)[0].T.reshape(3, 2, 2, 2)
    A.attach(conv, A.AdapterSpec(rank=3))
    _fit(conv, x, y)
    with torch.no_grad():
        assert np.abs(conv[0].weight.numpy() - w_ls).max() < 1e-6


# ---------------------------------------------------------------------------------- arithmetic
def _adapter(teacher, seed, rank, layers=("*",)):
    s = copy.deepcopy(teacher)
    A.attach(s, A.AdapterSpec(rank=rank, layers=list(layers), scale=2.0 * rank, seed=seed))
    return A.Adapter.extract(randomize(s, seed=seed))


def test_combination_is_the_scaled_sum_of_weight_changes():
    """combine(a, b, s_a, s_b) changes every weight by s_a dW_a + s_b dW_b (layers only one adapts included),
    checked in float64 against the sum of the separate changes, and through the merged network."""
    teacher = mlp().double()
    a = _adapter(teacher, 1, 3)
    b = _adapter(teacher, 2, 2, layers=("blocks.*", "out"))
    c = A.Adapter.combine(a, b, 0.7, -1.3)
    da, db, dc = a.deltas(), b.deltas(), c.deltas()
    assert set(dc) == set(da) | set(db)
    for name in dc:
        want = 0.7 * da.get(name, 0) + (-1.3) * db.get(name, 0)
        torch.testing.assert_close(dc[name], want, rtol=1e-12, atol=1e-14)
    assert c.layers["out"].factor_in.shape[0] == 5  # stacked ranks on shared layers
    net = c.apply(copy.deepcopy(teacher))
    merged = A.merged_copy(net).state_dict()
    for name, d in dc.items():
        torch.testing.assert_close(merged[f"{name}.weight"], teacher.get_submodule(name).weight + d,
                                   rtol=0, atol=1e-14)


def test_apply_with_scale_multiplies_the_change_and_transfers_to_another_teacher():
    teacher, other = mlp(0).double(), mlp(7).double()
    a = _adapter(teacher, 1, 2)
    with pytest.raises(A.AdapterError, match="allow_other_base=true"):
        a.apply(copy.deepcopy(other))
    net = a.apply(copy.deepcopy(other), scale=0.5, allow_other_base=True)
    merged = A.merged_copy(net).state_dict()
    for name, d in a.deltas().items():
        torch.testing.assert_close(merged[f"{name}.weight"], other.get_submodule(name).weight + 0.5 * d,
                                   rtol=0, atol=1e-14)
    assert A.trainable_count(net) == a.parameter_count


# ---------------------------------------------------------------------------------- files
@pytest.mark.parametrize("make", [mlp, unet])
def test_saved_adapter_reproduces_samples_exactly(make, tmp_path):
    """Save the adapter alone, read it onto a freshly built teacher: the DDIM samples are identical, and the
    file is a small fraction of the full network's weights."""
    teacher = make()
    student = copy.deepcopy(teacher)
    whole = ["conv_out.bias" if make is unet else "out.bias"]
    A.attach(student, A.AdapterSpec(rank=2, train_also=whole))
    randomize(student)
    with torch.no_grad():
        student.get_parameter(whole[0]).add_(0.3)
    ad = A.Adapter.extract(student, whole, {"steps": 4})
    path = tmp_path / "speed.safetensors"
    ad.save(path)
    back = A.Adapter.read(path)
    assert back.info == {"steps": 4} and back.base_sha256 == A.base_digest(teacher, whole)
    rebuilt = back.apply(make())
    x, _ = inputs(teacher)
    grid = uniform_grid(4)
    with torch.no_grad():
        s1 = sample(NetDenoiser(student), x, grid, "ddim")
        s2 = sample(NetDenoiser(rebuilt), x, grid, "ddim")
        s0 = sample(NetDenoiser(teacher), x, grid, "ddim")
    assert torch.equal(s1, s2) and not torch.equal(s1, s0)
    full = sum(p.numel() for p in teacher.parameters())
    assert back.parameter_count < full / 4


# ---------------------------------------------------------------------------------- bad input
@pytest.mark.parametrize("rank", [0, -2, True, 1.5])
def test_rank_must_be_a_whole_number_above_zero(rank):
    with pytest.raises(A.AdapterError) as e:
        A.attach(mlp(), A.AdapterSpec(rank=rank))
    assert str(e.value).startswith(f"adapter.rank={rank!r}: must be") and "\n" not in str(e.value)


def test_scale_must_be_positive():
    with pytest.raises(A.AdapterError, match=r"^adapter.scale=0: "):
        A.attach(mlp(), A.AdapterSpec(scale=0))


def test_a_pattern_matching_no_layer_is_named():
    net = mlp()
    with pytest.raises(A.AdapterError) as e:
        A.attach(net, A.AdapterSpec(layers=["blocks.*.inner", "blocks.*.norm"]))  # norm is Identity here
    assert "'blocks.*.norm' matches no Linear or Conv2d layer" in str(e.value) and "\n" not in str(e.value)
    assert not A.adapted(net)  # nothing attached before the check
    with pytest.raises(A.AdapterError, match="train_also: pattern 'nope'"):
        A.attach(mlp(), A.AdapterSpec(train_also=["nope"]))


def test_shape_mismatch_names_the_first_mismatching_layer():
    a = _adapter(mlp(width=32), 1, 2)
    wider = build_net("mlp", (2,), 0, width=48, depth=2)
    with pytest.raises(A.AdapterError) as e:
        a.apply(wider, allow_other_base=True)
    msg = str(e.value)
    assert "layer 'embed.time_mlp.0' has weight shape [32, 32] in the adapter but [48, 32]" in msg, msg
    assert "\n" not in msg and not A.adapted(wider)


def test_hash_mismatch_refused_without_override(tmp_path):
    a = _adapter(mlp(0), 1, 2)
    path = tmp_path / "a.safetensors"
    a.save(path)
    with pytest.raises(A.AdapterError) as e:
        A.Adapter.read(path).apply(mlp(3))
    assert str(e.value).startswith(str(path)) and "allow_other_base=true" in str(e.value)
    A.Adapter.read(path).apply(mlp(3), allow_other_base=True)  # the explicit override


def test_damaged_files_are_one_line_errors(tmp_path):
    bad = tmp_path / "bad.safetensors"
    bad.write_bytes(b"\x10\x00\x00\x00\x00\x00\x00\x00{not json}......")
    for path in (bad, tmp_path / "missing.safetensors"):
        with pytest.raises(A.AdapterError) as e:
            A.Adapter.read(path)
        assert str(path) in str(e.value) and "\n" not in str(e.value)
    from distillrun.checkpoint import atomic_save_tensors
    plain = tmp_path / "plain.safetensors"
    atomic_save_tensors(plain, {"w": torch.zeros(2)})
    with pytest.raises(A.AdapterError, match="not an adapter file"):
        A.Adapter.read(plain)


def test_attach_and_apply_leave_the_global_random_state_alone():
    """A run's seed must not shift because a student got adapters (the factor_in draw uses its own generator)."""
    net, a = mlp(), _adapter(mlp(), 3, 2)
    torch.manual_seed(11)
    before = torch.random.get_rng_state()
    A.attach(copy.deepcopy(net), A.AdapterSpec(rank=2))
    a.apply(copy.deepcopy(net))
    assert torch.equal(before, torch.random.get_rng_state())
