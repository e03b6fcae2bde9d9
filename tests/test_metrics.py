"""Reference checks for distillrun.metrics; every check names its outside source."""
from __future__ import annotations

import math

import numpy as np
import ot
import pytest
import scipy.linalg
import scipy.stats
import torch

from distillrun import metrics as M


def gen(seed: int) -> torch.Generator:
    return torch.Generator().manual_seed(seed)


# ------------------------------------------------------------------------------------ sliced Wasserstein
def test_random_projections_unit_and_seeded():
    p = M.random_projections(5, 40, seed=3)
    assert p.shape == (40, 5)
    torch.testing.assert_close(p.norm(dim=1), torch.ones(40, dtype=torch.float64))
    assert torch.equal(p, M.random_projections(5, 40, seed=3))
    assert not torch.equal(p, M.random_projections(5, 40, seed=4))


@pytest.mark.parametrize("n,m", [(400, 400), (500, 333), (64, 1000)])
@pytest.mark.parametrize("p", [1.0, 2.0])
def test_sliced_wasserstein_matches_pot(n, m, p):
    # Source: POT, ot.sliced_wasserstein_distance (Flamary et al. 2021, JMLR; Bonneel et al. 2015).
    # POT takes projections as (dim, n_projections) and returns (mean_k W_p^p)^(1/p).
    x = torch.randn(n, 3, generator=gen(0), dtype=torch.float64)
    y = 1.5 * torch.randn(m, 3, generator=gen(1), dtype=torch.float64) + torch.tensor([0.5, -1.0, 0.0])
    proj = M.random_projections(3, 25, seed=7)
    ref = ot.sliced_wasserstein_distance(x.numpy(), y.numpy(), projections=proj.T.numpy(), p=p)
    assert M.sliced_wasserstein(x, y, proj, p=p) == pytest.approx(float(ref), rel=1e-10, abs=1e-12)
    if p == 2.0:
        assert M.sliced_w2(x, y, proj) == pytest.approx(float(ref), rel=1e-10)


def test_sliced_w2_equal_sizes_is_sorted_mean_square():
    # Definition (Bonneel et al. 2015): equal sizes -> sorted projections, mean squared difference, sqrt at end.
    x = torch.randn(300, 2, generator=gen(2), dtype=torch.float64)
    y = torch.randn(300, 2, generator=gen(3), dtype=torch.float64) * 2
    proj = M.random_projections(2, 10, seed=0)
    xs, ys = (x @ proj.T).sort(0).values, (y @ proj.T).sort(0).values
    expected = math.sqrt(float(((xs - ys) ** 2).mean(0).mean()))
    assert M.sliced_w2(x, y, proj) == pytest.approx(expected, rel=1e-12)
    assert M.sliced_w2(x, x, proj) == 0.0


def test_1d_w2_matches_pot_wasserstein_1d():
    # Source: POT ot.wasserstein_1d(u, v, p=2) returns W_2^2 between 1-D empirical measures.
    x = torch.randn(700, 1, generator=gen(4), dtype=torch.float64)
    y = torch.randn(450, 1, generator=gen(5), dtype=torch.float64) * 0.5 + 1
    ref = ot.wasserstein_1d(x.numpy()[:, 0], y.numpy()[:, 0], p=2)
    assert M.sliced_w2(x, y, torch.ones(1, 1)) == pytest.approx(math.sqrt(float(ref)), rel=1e-10)


def test_1d_w1_matches_scipy():
    # Source: scipy.stats.wasserstein_distance is W_1 between 1-D empirical distributions.
    x = torch.randn(600, generator=gen(6), dtype=torch.float64)
    y = torch.randn(250, generator=gen(7), dtype=torch.float64) * 3 - 1
    ref = scipy.stats.wasserstein_distance(x.numpy(), y.numpy())
    assert M.sliced_wasserstein(x[:, None], y[:, None], torch.ones(1, 1), p=1) == pytest.approx(ref, rel=1e-10)


def test_1d_w2_gaussians_closed_form():
    # Closed form W_2^2(N(m1,s1^2), N(m2,s2^2)) = (m1-m2)^2 + (s1-s2)^2 (Dowson & Landau 1982, 1-D case).
    n = 200_000
    x = 0.0 + 1.0 * torch.randn(n, 1, generator=gen(8), dtype=torch.float64)
    y = 1.0 + 2.0 * torch.randn(n, 1, generator=gen(9), dtype=torch.float64)
    assert M.sliced_w2(x, y, torch.ones(1, 1)) ** 2 == pytest.approx(1.0 + 1.0, rel=0.02)


# ----------------------------------------------------------------------------------------------- MMD
def expected_rbf(mean_diff_sq: float, var_sum: float, h: float, d: int) -> float:
    """E exp(-|x-y|^2/(2h^2)) for independent x ~ N(a, s_a^2 I_d), y ~ N(b, s_b^2 I_d), var_sum = s_a^2 + s_b^2.

    x - y ~ N(a - b, var_sum I). Per dimension, exp(-z^2/(2h^2)) = sqrt(2 pi h^2) N(z; 0, h^2) and
    int N(z; mu, s^2) N(z; 0, h^2) dz = N(mu; 0, s^2 + h^2) (Gaussian product identity, Petersen &
    Pedersen, The Matrix Cookbook, Sec. 8.1.8), giving (h^2/(h^2+s^2))^(1/2) exp(-mu^2/(2(h^2+s^2))).
    In matrix form: det(I + Sigma/h^2)^(-1/2) exp(-1/2 mu^T (Sigma + h^2 I)^(-1) mu)."""
    return (1.0 + var_sum / h**2) ** (-d / 2) * math.exp(-mean_diff_sq / (2 * (var_sum + h**2)))


def test_mmd2_matches_gaussian_closed_form():
    # MMD^2 = E k(x,x') + E k(y,y') - 2 E k(x,y) (Gretton et al. 2012, Lemma 6); the unbiased estimator's
    # mean over independent repetitions must match the closed form within a few standard errors.
    d, h, s1, s2 = 2, 1.0, 1.0, 1.3
    shift = torch.tensor([0.6, 0.0], dtype=torch.float64)
    truth = (expected_rbf(0.0, 2 * s1**2, h, d) + expected_rbf(0.0, 2 * s2**2, h, d)
             - 2 * expected_rbf(float(shift @ shift), s1**2 + s2**2, h, d))
    g = gen(10)
    est = torch.tensor([M.mmd2_rbf(s1 * torch.randn(400, d, generator=g, dtype=torch.float64),
                                   shift + s2 * torch.randn(300, d, generator=g, dtype=torch.float64), h)
                        for _ in range(30)])
    se = float(est.std() / math.sqrt(len(est)))
    assert truth > 10 * se
    assert abs(float(est.mean()) - truth) < 4 * se


def test_mmd2_unbiased_for_identical_distributions():
    # Unbiasedness of MMD_u^2 (Gretton et al. 2012, Lemma 6): mean over repetitions ~ 0 when P = Q.
    g = gen(11)
    est = torch.tensor([M.mmd2_rbf(torch.randn(200, 3, generator=g, dtype=torch.float64),
                                   torch.randn(250, 3, generator=g, dtype=torch.float64), 1.5)
                        for _ in range(40)])
    assert (est < 0).any()  # the biased V-statistic would always be >= 0
    assert abs(float(est.mean())) < 4 * float(est.std() / math.sqrt(len(est)))


def test_mmd2_matches_dense_formula_and_block_sums():
    # Direct transcription of Gretton et al. 2012, Eq. 3 with dense kernel matrices.
    x = torch.randn(1500, 2, generator=gen(12), dtype=torch.float64)  # > one block of rows
    y = torch.randn(1200, 2, generator=gen(13), dtype=torch.float64) + 0.2
    h = 0.8
    k = lambda a, b: torch.exp(-torch.cdist(a, b) ** 2 / (2 * h * h))  # noqa: E731
    n, m = len(x), len(y)
    kxx, kyy = k(x, x), k(y, y)
    ref = ((kxx.sum() - kxx.diag().sum()) / (n * (n - 1)) + (kyy.sum() - kyy.diag().sum()) / (m * (m - 1))
           - 2 * k(x, y).mean())
    assert M.mmd2_rbf(x, y, h) == pytest.approx(float(ref), rel=1e-9, abs=1e-12)


def test_median_bandwidth_definition_and_default():
    # Median heuristic (Gretton et al. 2012, Sec. 8): median pairwise distance in the pooled sample.
    x = torch.randn(60, 2, generator=gen(14), dtype=torch.float64)
    y = torch.randn(40, 2, generator=gen(15), dtype=torch.float64) + 1
    z = np.concatenate([x.numpy(), y.numpy()])
    ref = np.median(scipy.spatial.distance.pdist(z))
    assert M.median_bandwidth(x, y) == pytest.approx(ref, rel=0.02)  # lower median of an even count
    assert M.mmd2_rbf(x, y) == M.mmd2_rbf(x, y, M.median_bandwidth(x, y))


def test_mmd2_memory_safe_sizes_run():
    # The sizes the evaluator uses: 4096 x 2-D and 1000 x 64-D.
    g = gen(16)
    x, y = torch.randn(4096, 2, generator=g), torch.randn(4096, 2, generator=g)
    h = M.median_bandwidth(x, y)
    assert abs(M.mmd2_rbf(x, y, h)) < 2e-3
    x, y = torch.randn(1000, 64, generator=g), torch.randn(1000, 64, generator=g)
    assert math.isfinite(M.mmd2_rbf(x, y))


def test_mmd2_block_se_tracks_repetition_spread():
    # B-test construction (Zaremba, Gretton & Blaschko 2013): for P != Q the block SE should be of the same
    # order as the spread of the full estimator over independent repetitions.
    g = gen(17)
    draw = lambda: (torch.randn(1000, 2, generator=g, dtype=torch.float64),  # noqa: E731
                    torch.randn(1000, 2, generator=g, dtype=torch.float64) + torch.tensor([0.5, 0.0]))
    reps = torch.tensor([M.mmd2_rbf(*draw(), 1.0) for _ in range(20)])
    se = M.mmd2_block_se(*draw(), 1.0, blocks=10)
    assert 0.4 < se / float(reps.std()) < 2.5


# ------------------------------------------------------------------------------------------- Fréchet
def spd(d: int, seed: int) -> np.ndarray:
    a = np.random.default_rng(seed).normal(size=(d, d))
    return a @ a.T / d + 0.1 * np.eye(d)


def test_frechet_matches_scipy_sqrtm_formula():
    # Dowson & Landau 1982: W2^2 = |mu1-mu2|^2 + tr(C1 + C2 - 2 (C1^1/2 C2 C1^1/2)^1/2), reference sqrt by
    # scipy.linalg.sqrtm; also equal to the FID-code form tr sqrtm(C1 C2) (Heusel et al. 2017).
    d = 6
    rng = np.random.default_rng(0)
    mu1, mu2 = rng.normal(size=d), rng.normal(size=d)
    c1, c2 = spd(d, 1), spd(d, 2)
    s1 = scipy.linalg.sqrtm(c1).real
    ref = (np.sum((mu1 - mu2) ** 2) + np.trace(c1) + np.trace(c2)
           - 2 * np.trace(scipy.linalg.sqrtm(s1 @ c2 @ s1).real))
    ref_fid = np.sum((mu1 - mu2) ** 2) + np.trace(c1 + c2 - 2 * scipy.linalg.sqrtm(c1 @ c2).real)
    got = M.frechet_distance(torch.tensor(mu1), torch.tensor(c1), torch.tensor(mu2), torch.tensor(c2))
    assert got == pytest.approx(ref, rel=1e-8)
    assert got == pytest.approx(ref_fid, rel=1e-8)
    assert M.frechet_distance(torch.tensor(mu1), torch.tensor(c1), torch.tensor(mu1), torch.tensor(c1)) == \
        pytest.approx(0.0, abs=1e-9)


def test_frechet_commuting_covariances_closed_form():
    # Dowson & Landau 1982 with commuting (diagonal) covariances: |mu1-mu2|^2 + sum_i (sqrt(a_i) - sqrt(b_i))^2.
    a, b = torch.tensor([1.0, 4.0, 0.25]), torch.tensor([9.0, 1.0, 0.25])
    mu1, mu2 = torch.zeros(3), torch.tensor([1.0, 2.0, 0.0])
    expected = 5.0 + float(((a.sqrt() - b.sqrt()) ** 2).sum())
    assert M.frechet_distance(mu1, torch.diag(a), mu2, torch.diag(b)) == pytest.approx(expected, rel=1e-10)


def test_frechet_singular_covariance_is_finite():
    # Rank-deficient covariances (fewer samples than features) must not produce NaN.
    f1 = torch.randn(10, 32, generator=gen(18))
    f2 = torch.randn(12, 32, generator=gen(19))
    assert math.isfinite(M.frechet_from_features(f1, f2))


def test_frechet_from_features_large_samples():
    # Sample mean/covariance (numpy.cov convention) of large Gaussian samples -> closed form (Dowson & Landau 1982).
    g = gen(20)
    mu2 = torch.tensor([1.0, -1.0], dtype=torch.float64)
    c2 = torch.tensor([[2.0, 0.5], [0.5, 1.0]], dtype=torch.float64)
    f1 = torch.randn(100_000, 2, generator=g, dtype=torch.float64)
    f2 = torch.randn(100_000, 2, generator=g, dtype=torch.float64) @ torch.linalg.cholesky(c2).T + mu2
    mu, cov = M.mean_cov(f2)
    np.testing.assert_allclose(cov.numpy(), np.cov(f2.numpy(), rowvar=False), rtol=1e-10)
    truth = M.frechet_distance(torch.zeros(2), torch.eye(2), mu2, c2)
    assert M.frechet_from_features(f1, f2) == pytest.approx(truth, rel=0.03)


# ------------------------------------------------------------------------------------------- NLL gap
def gaussian_log_prob(mean: torch.Tensor, s: float):
    return lambda x: torch.distributions.Normal(mean, s).log_prob(x).sum(-1)


def test_nll_gap_exact_and_shifted_gaussian():
    # Entropy of N(m, s^2 I_d) = d/2 log(2 pi e s^2) (Cover & Thomas 2006, Thm 8.4.1). For samples of
    # q = N(delta, s^2 I) and density p = N(0, s^2 I): mean(-log p) - H(p) = KL(q||p) + H(q) - H(p)
    # = |delta|^2 / (2 s^2), since H(q) = H(p) (KL between Gaussians, closed form).
    d, s, n = 2, 0.7, 40_000
    g = gen(21)
    log_p = gaussian_log_prob(torch.zeros(d, dtype=torch.float64), s)
    entropy = d / 2 * math.log(2 * math.pi * math.e * s * s)
    exact = M.nll_gap(log_p, s * torch.randn(n, d, generator=g, dtype=torch.float64), entropy)
    assert abs(exact["gap"]) < 4 * exact["se"]
    assert exact["se"] == pytest.approx(math.sqrt(d / 2) / math.sqrt(n), rel=0.05)  # Var(-log p) = d/2
    delta = torch.tensor([0.5, -0.3], dtype=torch.float64)
    shifted = M.nll_gap(log_p, delta + s * torch.randn(n, d, generator=g, dtype=torch.float64), entropy)
    kl = float(delta @ delta) / (2 * s * s)
    assert abs(shifted["gap"] - kl) < 4 * shifted["se"]


# -------------------------------------------------------------------------------------- mode coverage
def test_mode_coverage_hand_example():
    # Hand example; TV = 0.5 * L1 (standard definition); 0.25 x weight threshold is our choice.
    weights = torch.tensor([0.5, 0.3, 0.2])
    hard = torch.tensor([0, 0, 0, 0, 0, 0, 0, 1, 1, 1])  # shares 0.7, 0.3, 0.0
    out = M.mode_coverage(hard, weights)
    assert out["shares"] == pytest.approx([0.7, 0.3, 0.0])
    assert out["tv"] == pytest.approx(0.2)
    assert out["dropped"] == 1
    soft = torch.nn.functional.one_hot(hard, 3).double()
    assert M.mode_coverage(soft, weights) == out
    # share 0.06 of weight 0.2 (= 0.3 x weight) is kept; 0.04 (= 0.2 x weight) is dropped
    keep = M.mode_coverage(torch.tensor([[0.47, 0.47, 0.06]]), weights)
    drop = M.mode_coverage(torch.tensor([[0.48, 0.48, 0.04]]), weights)
    assert (keep["dropped"], drop["dropped"]) == (0, 1)


# ---------------------------------------------------------------------------------------- divergence
def test_divergence_identical_is_zero():
    x = torch.randn(100, 2, 4, 4, generator=gen(22))
    out = M.divergence(x, x.clone())
    assert out == {"rms": 0.0, "median": 0.0, "p90": 0.0}


def test_divergence_hand_example_and_switch_share():
    # Per-sample RMS over dims: rows differ by (3,4) -> sqrt((9+16)/2); by (0,0); by (1,1) -> 1.
    t = torch.zeros(3, 2)
    s = torch.tensor([[3.0, 4.0], [0.0, 0.0], [1.0, 1.0]])
    out = M.divergence(s, t, torch.tensor([0, 1, 2]), torch.tensor([1, 1, 2]))
    d = [math.sqrt(12.5), 0.0, 1.0]
    assert out["rms"] == pytest.approx(math.sqrt(sum(v * v for v in d) / 3))
    assert out["median"] == pytest.approx(1.0)
    assert out["p90"] == pytest.approx(float(np.percentile(d, 90)))  # numpy's default linear interpolation
    assert out["switch_share"] == pytest.approx(1 / 3)
    with pytest.raises(ValueError):
        M.divergence(s, t, torch.tensor([0, 1, 2]))


# ----------------------------------------------------------------------------------------- bootstrap
def test_bootstrap_se_of_mean_is_textbook():
    # SE of a sample mean = sigma / sqrt(n) (Efron & Tibshirani 1993, Ch. 5-6).
    n = 2000
    x = 3.0 * torch.randn(n, generator=gen(23), dtype=torch.float64)
    se = M.bootstrap_se(lambda a: float(a.mean()), x, reps=200, seed=1)
    assert se == pytest.approx(float(x.std()) / math.sqrt(n), rel=0.2)
    assert se == M.bootstrap_se(lambda a: float(a.mean()), x, reps=200, seed=1)


def test_bootstrap_paired_vs_independent():
    # Paired resampling keeps matched rows together: the difference of identical arrays never varies.
    x = torch.randn(500, generator=gen(24), dtype=torch.float64)
    diff = lambda a, b: float((a - b).mean())  # noqa: E731
    assert M.bootstrap_se(diff, x, x.clone(), reps=20, paired=True) == 0.0
    assert M.bootstrap_se(diff, x, x.clone(), reps=20, paired=False) > 0.0
    with pytest.raises(ValueError):
        M.bootstrap_se(diff, x, x[:10], paired=True)


def test_bootstrap_se_for_sliced_w2_runs():
    # Two independent sample sets (model vs data): SW2's bootstrap SE is positive and small against SW2.
    x = torch.randn(800, 2, generator=gen(25))
    y = torch.randn(600, 2, generator=gen(26)) + 1.0
    proj = M.random_projections(2, 16, seed=0)
    se = M.bootstrap_se(lambda a, b: M.sliced_w2(a, b, proj), x, y, reps=20)
    assert 0 < se < 0.2 * M.sliced_w2(x, y, proj)


# ------------------------------------------------------------- k-NN precision, recall, density, coverage
def test_manifold_metrics_hand_example():
    # Hand arithmetic from the definitions: Kynkaenniemi et al. 2019 (precision, recall, Eq. 1-2) and Naeem et al.
    # 2020 (density, coverage, Eq. 3-4). real = 0,1,2,3 on a line, k = 1: every real radius is 1. fake = 0.5, 10.
    # 0.5 lies in the balls of reals 0 and 1 (not 2: 1.5 > 1); 10 in none -> precision 1/2, density (2+0)/(1*2) = 1.
    # coverage: reals 0 and 1 have a fake within radius 1 (0.5 away); 2 and 3 do not -> 1/2.
    # recall: fake radii (k = 1) are 9.5 each; every real lies within 9.5 of 0.5 -> 1.
    real = torch.tensor([[0.0], [1.0], [2.0], [3.0]])
    fake = torch.tensor([[0.5], [10.0]])
    torch.testing.assert_close(M.knn_radii(real, 1), torch.ones(4, dtype=torch.float64))
    out = M.manifold_metrics(real, fake, k=1)
    assert (out["precision"], out["recall"], out["density"], out["coverage"]) == (0.5, 1.0, 1.0, 0.5)
    # per-point standard errors: precision terms (1, 0): std 0.7071 / sqrt(2) = 0.5 (hand arithmetic)
    assert out["precision_se"] == pytest.approx(0.5)


def test_manifold_metrics_second_hand_example_2d():
    # 2D, k = 2 (hand arithmetic). real: (0,0), (1,0), (0,1), (5,5). Radii (2nd nearest other real): (0,0): 1;
    # (1,0): sqrt2; (0,1): sqrt2; (5,5): |(5,5)-(1,0)| = sqrt41. fake: (0.5,0.5), (9,5), (20,20).
    # (0.5,0.5): 0.707 from the first three (inside each: 0.707 <= 1, sqrt2) and 6.36 from (5,5) (<= 6.40: inside)
    # -> 4 balls. (9,5): 4 from (5,5) -> inside; 9.0+ from the others (> radii) -> 1 ball. (20,20): 21.2 from (5,5)
    # > 6.40 -> 0. precision 2/3, density (4+1+0)/(2*3) = 5/6.
    # coverage: nearest fake to (0,0),(1,0),(0,1) is 0.707 away (inside); to (5,5) 4 (inside sqrt41) -> 1.
    # recall: fake radii (2nd nearest other fake): (0.5,0.5): |(20,20)-(0.5,0.5)| = 27.6; (9,5): 19.0 (to (20,20));
    # (20,20): 19.0 -> every real is within 27.6 of (0.5,0.5) -> 1.
    real = torch.tensor([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [5.0, 5.0]])
    fake = torch.tensor([[0.5, 0.5], [9.0, 5.0], [20.0, 20.0]])
    out = M.manifold_metrics(real, fake, k=2)
    assert out["precision"] == pytest.approx(2 / 3)
    assert out["density"] == pytest.approx(5 / 6)
    assert out["coverage"] == 1.0 and out["recall"] == 1.0


def test_manifold_metrics_match_dense_definitions():
    # The papers' equations transcribed with scipy's dense distance matrix (scipy.spatial.distance.cdist), on random
    # data in 3 and 20 dimensions (KD-tree and ball-tree paths).
    from scipy.spatial.distance import cdist

    for d in (3, 20):
        x = np.random.default_rng(d).normal(size=(300, d))
        y = np.random.default_rng(d + 1).normal(size=(250, d)) * 1.2 + 0.3
        k = 5
        dxx, dyy, dxy = cdist(x, x), cdist(y, y), cdist(x, y)
        rx = np.sort(dxx, axis=1)[:, k]  # column 0 is the point itself
        ry = np.sort(dyy, axis=1)[:, k]
        inside = dxy <= rx[:, None]  # (real i, fake j)
        ref = {"precision": inside.any(0).mean(), "density": inside.sum() / (k * len(y)),
               "recall": (dxy <= ry[None, :]).any(1).mean(), "coverage": (dxy.min(1) <= rx).mean()}
        out = M.manifold_metrics(torch.from_numpy(x), torch.from_numpy(y), k=k)
        for name, v in ref.items():
            assert out[name] == pytest.approx(v, abs=1e-12), (d, name)


def test_manifold_metrics_separate_off_manifold_from_dropped_mode():
    # Naeem et al. 2020, Sec. 3: density/precision fall with samples off the data; coverage/recall with dropped modes.
    g = gen(40)
    modes = torch.tensor([[-4.0, 0.0], [4.0, 0.0]])
    real = modes[torch.randint(0, 2, (2000,), generator=g)] + 0.3 * torch.randn(2000, 2, generator=g)
    exact = modes[torch.randint(0, 2, (2000,), generator=g)] + 0.3 * torch.randn(2000, 2, generator=g)
    one_mode = modes[0] + 0.3 * torch.randn(2000, 2, generator=g)
    off = exact.clone()
    off[:400] = torch.tensor([0.0, 6.0]) + 0.3 * torch.randn(400, 2, generator=g)  # 20% far from any data
    e, dropped, o = (M.manifold_metrics(real, s) for s in (exact, one_mode, off))
    assert e["precision"] > 0.95 and e["coverage"] > 0.9
    assert dropped["coverage"] < 0.55 and dropped["precision"] > 0.95  # half the data uncovered, samples on data
    assert o["precision"] == pytest.approx(0.8, abs=0.02) and o["coverage"] > 0.9


# ---------------------------------------------------------------------------- classifier two-sample test
def test_c2st_exact_sets_within_binomial_interval():
    # Lopez-Paz & Oquab 2017, Sec. 2: under P = Q the held-out accuracy is Binomial(n_test, 1/2) / n_test.
    # 99.9% interval from scipy.stats.binom; each seed is an independent pair of exact sets.
    for seed in range(3):
        g = gen(50 + seed)
        x, y = torch.randn(1500, 2, generator=g), torch.randn(1500, 2, generator=g)
        out = M.classifier_two_sample(x, y, seed=seed)
        lo, hi = scipy.stats.binom.interval(0.999, out["n_test"], 0.5)
        assert lo / out["n_test"] <= out["acc"] <= hi / out["n_test"]
        assert out["se"] == pytest.approx(math.sqrt(out["acc"] * (1 - out["acc"]) / out["n_test"]))


def test_c2st_separated_sets_near_one_and_deterministic():
    # Well-separated sets (means 10 sd apart): every held-out point is classified right (Lopez-Paz & Oquab 2017:
    # accuracy -> 1/2 + TV/2 = 1).
    g = gen(53)
    x, y = torch.randn(800, 2, generator=g), torch.randn(600, 2, generator=g) + 10.0
    out = M.classifier_two_sample(x, y)
    assert out["acc"] > 0.99 and out["n_test"] == 1400
    assert M.classifier_two_sample(x, y) == out  # no training randomness: same data, same seed, same answer


def test_c2st_sees_a_shift_a_tenth_of_the_sd():
    # Bayes accuracy for N(0,1) vs N(0.5,1) in 1 of 2 dims: 1/2 + TV/2 = Phi(0.25) = 0.599 (normal CDF, scipy);
    # a k-NN vote reaches part of it: clearly above 1/2 by many se, below the Bayes limit.
    g = gen(54)
    x, y = torch.randn(3000, 2, generator=g), torch.randn(3000, 2, generator=g) + torch.tensor([0.5, 0.0])
    out = M.classifier_two_sample(x, y)
    bayes = scipy.stats.norm.cdf(0.25)
    assert 0.5 + 4 * out["se"] < out["acc"] < bayes + 2 * out["se"]


# ------------------------------------------------------------------------------------- multi-scale MMD
def test_mmd2_multiscale_matches_gaussian_closed_form_at_each_bandwidth():
    # Closed form of E k for Gaussians (expected_rbf above; Gretton et al. 2012, Lemma 6 for MMD^2) at 4 bandwidths,
    # from 1/8 to 2 of the unit scale; the multi-scale call must also equal mmd2_rbf bandwidth by bandwidth.
    d, s1, s2 = 2, 1.0, 1.3
    shift = torch.tensor([0.6, 0.0], dtype=torch.float64)
    hs = [0.125, 0.5, 1.0, 2.0]
    truth = [expected_rbf(0.0, 2 * s1**2, h, d) + expected_rbf(0.0, 2 * s2**2, h, d)
             - 2 * expected_rbf(float(shift @ shift), s1**2 + s2**2, h, d) for h in hs]
    g = gen(60)
    draws = [(s1 * torch.randn(400, d, generator=g, dtype=torch.float64),
              shift + s2 * torch.randn(300, d, generator=g, dtype=torch.float64)) for _ in range(30)]
    est = torch.tensor([M.mmd2_multiscale(x, y, hs) for x, y in draws])
    x, y = draws[0]
    assert M.mmd2_multiscale(x, y, hs) == pytest.approx([M.mmd2_rbf(x, y, h) for h in hs], rel=1e-10, abs=1e-14)
    for j, h in enumerate(hs):
        se = float(est[:, j].std() / math.sqrt(len(est)))
        assert truth[j] > 5 * se, h
        assert abs(float(est[:, j].mean()) - truth[j]) < 4 * se, h
