"""Checks for distillrun.features on sklearn's digits (Alpaydin & Kaynak 1998, UCI; sklearn.datasets.load_digits)."""
from __future__ import annotations

import json

import pytest
import torch
from safetensors.torch import load_file

from distillrun.features import FeatureNet, feature_net_for, features
from distillrun.metrics import frechet_from_features

ITERATIONS = 300  # enough for ~99% train accuracy on digits; keeps the test to a few seconds per training


@pytest.fixture(scope="module")
def digits():
    from sklearn.datasets import load_digits

    d = load_digits()
    images = torch.tensor(d.images, dtype=torch.float32)[:, None] / 8.0 - 1.0  # pixel values 0..16 -> [-1, 1]
    return images, torch.tensor(d.target)


@pytest.fixture(scope="module")
def trained(digits, tmp_path_factory):
    images, labels = digits
    cache = tmp_path_factory.mktemp("features")
    return feature_net_for(images, labels, cache_dir=cache, seed=0, iterations=ITERATIONS), cache


def test_classifier_trains_and_gives_64_features(trained, digits):
    net, _ = trained
    images, _ = digits
    assert not net.training
    assert net.meta["kind"] == "classifier" and net.meta["from_cache"] is False
    assert net.meta["train_accuracy"] > 0.95
    f = features(net, images[:100], batch_size=32)
    assert f.shape == (100, 64)
    torch.testing.assert_close(f, features(net, images[:100]))


def test_deterministic_given_seed(trained, digits, tmp_path):
    # Same seed in a fresh cache folder -> bit-identical weights; global RNG state is left alone.
    net, _ = trained
    images, labels = digits
    state = torch.random.get_rng_state()
    again = feature_net_for(images, labels, cache_dir=tmp_path, seed=0, iterations=ITERATIONS)
    assert torch.equal(state, torch.random.get_rng_state())
    assert again.meta["from_cache"] is False and again.meta["key"] == net.meta["key"]
    for (k, a), (_, b) in zip(net.state_dict().items(), again.state_dict().items()):
        assert torch.equal(a, b), k


def test_frechet_real_vs_real_small_noise_large(trained, digits):
    # FID construction (Heusel et al. 2017) in our feature space: two halves of the real data are close,
    # uniform noise images are far (ratio chosen loosely; measured ~5 vs ~800 at 300 iterations).
    net, _ = trained
    images, _ = digits
    f = features(net, images)
    perm = torch.randperm(len(images), generator=torch.Generator().manual_seed(0))
    half = len(images) // 2
    real = frechet_from_features(f[perm[:half]], f[perm[half:]])
    noise = torch.rand(len(images) - half, 1, 8, 8, generator=torch.Generator().manual_seed(1)) * 2 - 1
    fake = frechet_from_features(f[perm[:half]], features(net, noise))
    assert fake > 20 * real


def test_second_call_hits_cache(trained, digits):
    net, cache = trained
    images, labels = digits
    again = feature_net_for(images, labels, cache_dir=cache, seed=0, iterations=ITERATIONS)
    assert again.meta["from_cache"] is True and again.meta["key"] == net.meta["key"]
    assert not again.training
    for (k, a), (_, b) in zip(net.state_dict().items(), again.state_dict().items()):
        assert torch.equal(a, b), k
    # on disk: safetensors + JSON, no temporary files left behind
    names = sorted(p.name for p in cache.iterdir())
    assert names == [f"{net.meta['key']}.json", f"{net.meta['key']}.safetensors"]
    meta = json.loads((cache / names[0]).read_text())
    assert meta["arch"]["feature_dim"] == 64 and "from_cache" not in meta
    assert set(load_file(str(cache / names[1]))) == set(net.state_dict())
    # a different seed is a different cache entry
    other = feature_net_for(images[:200], labels[:200], cache_dir=cache, seed=1, iterations=5)
    assert other.meta["key"] != net.meta["key"] and other.meta["from_cache"] is False


def test_autoencoder_without_labels_16px(tmp_path):
    # No labels -> autoencoder; 16x16 inputs work through global pooling.
    g = torch.Generator().manual_seed(0)
    images = torch.rand(64, 1, 16, 16, generator=g) * 2 - 1
    net = feature_net_for(images, cache_dir=tmp_path, iterations=5)
    assert isinstance(net, FeatureNet) and net.meta["kind"] == "autoencoder"
    assert features(net, images).shape == (64, 64)


def test_new_quality_metrics_run_in_the_feature_space(trained, digits):
    # The pipeline's evaluate.quality on images scores every metric on features (precision/recall: Kynkaenniemi
    # et al. 2019; density/coverage: Naeem et al. 2020; classifier two-sample test: Lopez-Paz & Oquab 2017).
    # Exact halves of the data: on the manifold, covered, indistinguishable. Digits 0-4 only (half the classes
    # dropped): coverage falls (~half of the data's balls empty), precision stays. Uniform noise: off the manifold.
    from distillrun import evaluate, metrics

    net, _ = trained
    images, labels = digits
    perm = torch.randperm(len(images), generator=torch.Generator().manual_seed(0))
    ref, half = images[perm[:898]], images[perm[898:1796]]
    feats = features(net, ref)
    bench = evaluate.Bench(None, None, ref, None, metrics.random_projections(feats.shape[1], 32, 0),
                           metrics.median_bandwidth(feats, feats), 10, 0, feature_net=net, reference_feats=feats)
    exact = evaluate.quality(bench, half)
    dropped = evaluate.quality(bench, half[labels[perm[898:1796]] < 5])
    noise = evaluate.quality(bench, torch.rand(400, *images.shape[1:], generator=torch.Generator().manual_seed(1)) * 2 - 1)
    for key in ("precision", "recall", "density", "coverage", "c2st", "mmd2_div4", "mmd2_div16", "fd"):
        assert key in exact and f"{key}_se" in exact, key
    assert exact["precision"] > 0.85 and exact["coverage"] > 0.85 and abs(exact["c2st"] - 0.5) < 4 * exact["c2st_se"]
    assert dropped["coverage"] < exact["coverage"] - 0.3 and dropped["precision"] > 0.85
    assert noise["precision"] < 0.1 and noise["c2st"] > 0.95
