"""Data: 2D shapes, digits, tiles and the user-file loaders, checked against numpy/SciPy/scikit-learn."""
import numpy as np
import pytest
import scipy.ndimage
import scipy.stats
import torch
from PIL import Image
from sklearn.datasets import load_digits
from sklearn.neighbors import KNeighborsClassifier

from distillrun.data import shapes2d
from distillrun.data.files import class_names, load_array, load_image_folder
from distillrun.data.images import TILE_CLASSES, digits, tiles


@pytest.mark.parametrize("name", sorted(shapes2d.SHAPES))
def test_shapes_are_centred_unit_std_and_not_gaussian(name):
    x = shapes2d.SHAPES[name](40_000, seed=1).numpy().astype(np.float64)
    assert x.shape == (40_000, 2)
    # Sampling error of the std at n = 40k is ~0.005 (std/sqrt(2n)); closed-form scale aims at 1 +- 0.004.
    np.testing.assert_allclose(np.std(x, axis=0), 1.0, atol=0.02)
    np.testing.assert_allclose(np.mean(x, axis=0), 0.0, atol=0.03)
    # D'Agostino-Pearson test (scipy.stats.normaltest) must reject normality of each axis.
    assert scipy.stats.normaltest(x, axis=0).pvalue.max() < 1e-6


@pytest.mark.parametrize("name", sorted(shapes2d.SHAPES))
def test_shapes_are_deterministic_given_the_seed(name):
    gen = shapes2d.SHAPES[name]
    a, b, c = gen(500, seed=7), gen(500, seed=7), gen(500, seed=8)
    assert a.dtype == torch.float32
    assert torch.equal(a, b) and not torch.equal(a, c)


def test_rings_have_the_stated_unequal_mass():
    x = shapes2d.rings(5_000, seed=2).numpy()
    radius = np.linalg.norm(x, axis=1) / shapes2d.rings_scale()
    inner = int(np.sum(radius < (shapes2d.RING_R_IN + shapes2d.RING_R_OUT) / 2))
    # Exact binomial test (scipy.stats.binomtest) of the inner share against RING_P_IN = 0.3.
    assert scipy.stats.binomtest(inner, len(x), shapes2d.RING_P_IN).pvalue > 1e-3


def test_digits_match_sklearn():
    ref = load_digits()  # reference: scikit-learn's bundled copy, 1797 8x8 images with values 0..16
    x, labels = digits(8, seed=None)
    assert x.shape == (1797, 1, 8, 8) and x.dtype == torch.float32
    np.testing.assert_allclose(x[:, 0].numpy(), ref.images / 8.0 - 1.0, atol=1e-6)
    np.testing.assert_array_equal(labels.numpy(), ref.target)
    assert x.min() == -1.0 and x.max() == 1.0


def test_digits_16_is_bilinear_upsampling():
    x, _ = digits(16, seed=None)
    assert x.shape == (1797, 1, 16, 16)
    assert x.min() >= -1.0 and x.max() <= 1.0
    # Reference: scipy.ndimage.zoom, linear, pixel-centred grid (grid_mode) with edge replication.
    ref = scipy.ndimage.zoom(load_digits().images[:50] / 8.0 - 1.0, (1, 2, 2), order=1, grid_mode=True, mode="nearest")
    np.testing.assert_allclose(x[:50, 0].numpy(), ref, atol=1e-5)


def test_digits_seed_only_reorders():
    x0, l0 = digits(8, seed=None)
    x1, l1 = digits(8, seed=3)
    assert not torch.equal(x1, x0) and torch.equal(x1, digits(8, seed=3)[0])
    key = lambda x, l: np.lexsort(np.c_[x.reshape(len(x), -1).numpy(), l.numpy()].T)  # noqa: E731
    np.testing.assert_array_equal(x0[key(x0, l0)].numpy(), x1[key(x1, l1)].numpy())
    np.testing.assert_array_equal(np.bincount(l0.numpy()), np.bincount(l1.numpy()))


@pytest.mark.parametrize("size", [8, 16])
def test_tiles_shape_range_determinism_and_classes(size):
    x, labels = tiles(203, size=size, seed=5)
    assert x.shape == (203, 1, size, size) and x.dtype == torch.float32 and labels.dtype == torch.long
    assert x.min() >= -1.0 and x.max() <= 1.0
    np.testing.assert_array_equal(np.unique(labels.numpy()), np.arange(len(TILE_CLASSES)))
    assert np.bincount(labels.numpy()).min() == 203 // 4  # balanced
    x2, labels2 = tiles(203, size=size, seed=5)
    assert torch.equal(x, x2) and torch.equal(labels, labels2)
    assert not torch.equal(x, tiles(203, size=size, seed=6)[0])


def test_tiles_are_antialiased_and_classes_separable():
    x, labels = tiles(1200, size=16, seed=0)
    # Hard edges would put every pixel at -1 (+ noise, std 0.03) or at -1 + 2 b >= 0.2: none in (-0.8, 0).
    assert np.mean((x.numpy() > -0.8) & (x.numpy() < 0.0)) > 0.02
    # scikit-learn 5-NN on held-out tiles is far above chance (0.25): the four classes look different.
    xt, lt = tiles(400, size=16, seed=1)
    knn = KNeighborsClassifier(5).fit(x.reshape(1200, -1).numpy(), labels.numpy())
    assert knn.score(xt.reshape(400, -1).numpy(), lt.numpy()) > 0.8


def test_load_array_round_trips_npy_and_npz(tmp_path):
    rng = np.random.default_rng(0)
    vec = rng.standard_normal((50, 3))
    np.save(tmp_path / "v.npy", vec)
    x, labels = load_array(tmp_path / "v.npy")
    assert x.dtype == torch.float32 and labels is None
    np.testing.assert_allclose(x.numpy(), vec, rtol=1e-6)

    img = rng.uniform(-1, 1, (4, 1, 8, 8)).astype(np.float32)
    lab = np.array([0, 2, 1, 2])
    np.savez(tmp_path / "d.npz", other=vec, pics=img, labels=lab)
    x, labels = load_array(tmp_path / "d.npz", key="pics")
    np.testing.assert_array_equal(x.numpy(), img)
    np.testing.assert_array_equal(labels.numpy(), lab)
    np.savez(tmp_path / "first.npz", labels=np.arange(50), a=vec, b=img)
    x, labels = load_array(tmp_path / "first.npz")  # default: first array that is not 'labels'
    np.testing.assert_allclose(x.numpy(), vec, rtol=1e-6)
    np.testing.assert_array_equal(labels.numpy(), np.arange(50))


@pytest.mark.parametrize("raw,expected", [
    (np.array([[[[0, 128, 255]]]], dtype=np.uint8), np.array([[[[-1.0, 128 / 127.5 - 1, 1.0]]]])),
    (np.array([[[[0.0, 0.25, 1.0]]]]), np.array([[[[-1.0, -0.5, 1.0]]]])),
    (np.array([[[[-0.5, 0.25, 0.5]]]]), np.array([[[[-0.5, 0.25, 0.5]]]])),  # already in [-1, 1]
])
def test_rescale_maps_common_ranges(tmp_path, raw, expected):
    np.save(tmp_path / "i.npy", raw)
    x, _ = load_array(tmp_path / "i.npy", rescale=True)
    np.testing.assert_allclose(x.numpy(), expected, atol=1e-6)


BAD_ARRAYS = {  # file name -> (what to write, expected message)
    "v.csv": (np.zeros((3, 2)), "extension '.csv'; valid: .npy, .npz"),
    "nan.npy": (np.array([[0.0, np.nan]]), "1 NaN or inf values"),
    "inf.npy": (np.array([[np.inf, 0.0]]), "1 NaN or inf values"),
    "empty.npy": (np.zeros((0, 2)), "array is empty"),
    "flat.npy": (np.zeros(5), r"shape \(5,\); valid: \(N, d\) vectors or \(N, C, H, W\)"),
    "hw.npy": (np.zeros((2, 8, 8)), r"shape \(2, 8, 8\); valid:"),
    "c2.npy": (np.zeros((2, 2, 8, 8)), r"C in \{1, 3\}"),
    "str.npy": (np.array([["a", "b"]]), "dtype '<U1' is not numeric"),
    "bool.npy": (np.ones((2, 2), dtype=bool), "dtype 'bool' is not numeric"),
    "obj.npy": (np.array([[{}, 1]], dtype=object), "needs pickle, which is refused"),
    "big.npy": (np.full((1, 1, 2, 2), 255.0), r"span \[255, 255\], outside \[-1, 1\].*rescale=True"),
}


@pytest.mark.parametrize("name", sorted(BAD_ARRAYS))
def test_load_array_rejects_bad_files(tmp_path, name):
    array, message = BAD_ARRAYS[name]
    path = tmp_path / name
    if name.endswith(".npy"):
        np.save(path, array, allow_pickle=True)
    else:
        np.savetxt(path, array)
    with pytest.raises(ValueError, match=message) as err:
        load_array(path)
    assert name in str(err.value) and "\n" not in str(err.value)


@pytest.mark.parametrize("write,kwargs,message", [
    (None, {}, "does not exist"),
    (lambda p: np.savez(p, a=np.zeros((3, 2))), {"key": "b"}, "no array 'b'; arrays present: a"),
    (lambda p: np.savez(p, labels=np.arange(3)), {}, "holds no data array"),
    (lambda p: np.savez(p, a=np.zeros((3, 2)), labels=np.arange(4)), {}, r"'labels' has shape \(4,\).*valid: \(3,\)"),
    (lambda p: np.savez(p, a=np.zeros((3, 2)), labels=np.ones(3)), {}, "dtype 'float64'; valid: \\(3,\\) integers"),
    (lambda p: np.savez(p, a=np.zeros((3, 2)), labels=-np.ones(3, int)), {}, "negative values"),
    (lambda p: p.write_bytes(b"not an archive at all"), {}, "needs pickle, which is refused"),
    (lambda p: p.write_bytes(b"PK\x03\x04 truncated zip"), {}, "cannot be read"),
])
def test_load_array_rejects_bad_npz(tmp_path, write, kwargs, message):
    path = tmp_path / "d.npz"
    if write is not None:
        write(path)
    with pytest.raises(ValueError, match=message) as err:
        load_array(path, **kwargs)
    assert "d.npz" in str(err.value)


def _write_png(path, pixels):
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(np.asarray(pixels, dtype=np.uint8), mode="L").save(path)


def test_image_folder_with_classes_round_trips(tmp_path):
    rng = np.random.default_rng(0)
    pics = {f"{c}/{i}.png": rng.integers(0, 256, (8, 8)) for c in ("cat", "ant") for i in range(2)}
    for rel, pix in pics.items():
        _write_png(tmp_path / rel, pix)
    (tmp_path / "ant" / "notes.txt").write_text("ignored")
    x, labels = load_image_folder(tmp_path, size=8)
    assert x.shape == (4, 1, 8, 8) and x.dtype == torch.float32
    assert class_names(tmp_path) == ["ant", "cat"]  # sorted: ant = 0, cat = 1
    np.testing.assert_array_equal(labels.numpy(), [0, 0, 1, 1])
    np.testing.assert_allclose(x[0, 0].numpy(), pics["ant/0.png"] / 127.5 - 1.0, atol=1e-6)
    np.testing.assert_allclose(x[3, 0].numpy(), pics["cat/1.png"] / 127.5 - 1.0, atol=1e-6)


def test_image_folder_flat_resizes_and_reads_rgb_jpeg(tmp_path):
    Image.fromarray(np.full((20, 20, 3), 200, dtype=np.uint8), mode="RGB").save(tmp_path / "a.jpg", quality=95)
    _write_png(tmp_path / "b.png", np.full((32, 32), 51))
    x, labels = load_image_folder(tmp_path, size=16)
    assert labels is None and x.shape == (2, 1, 16, 16)
    # Grey RGB (200, 200, 200) has luma 200 (ITU-R 601-2 weights sum to 1); JPEG may move it by a few levels.
    np.testing.assert_allclose(x[0].numpy(), 200 / 127.5 - 1, atol=0.03)
    np.testing.assert_allclose(x[1].numpy(), 51 / 127.5 - 1, atol=1e-6)


@pytest.mark.parametrize("setup,message", [
    (lambda p: None, "holds no images; valid: .png, .jpg, .jpeg"),
    (lambda p: (_write_png(p / "a.png", np.zeros((4, 4))), _write_png(p / "k" / "b.png", np.zeros((4, 4)))),
     r"mixes loose images with class subfolders \(k\)"),
    (lambda p: (p / "broken.png").write_bytes(b"not a png"), "broken.png' cannot be read"),
])
def test_image_folder_rejects_bad_folders(tmp_path, setup, message):
    setup(tmp_path)
    with pytest.raises(ValueError, match=message):
        load_image_folder(tmp_path, size=8)


def test_image_folder_missing(tmp_path):
    with pytest.raises(ValueError, match="'.*nowhere' does not exist"):
        load_image_folder(tmp_path / "nowhere", size=8)
