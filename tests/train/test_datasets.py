"""Datasets: the invented scenario, scikit-learn's bundled sets, user CSV / NPZ / NPY files."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from depthplan.config import DataConfig
from depthplan.train.datasets import load_dataset, synthetic_scenario
from depthplan.errors import DataError


def test_load_digits_shape_and_classes() -> None:
    # scikit-learn documents load_digits as 1,797 images of 8x8 pixels, 64 features, 10 classes
    # (UCI optical recognition of handwritten digits, Alpaydin and Kaynak 1998)
    d = load_dataset(DataConfig(source="digits", validation_fraction=0.2))
    assert d.n_features == 64
    assert d.n_classes == 10
    assert len(d.y_train) + len(d.y_val) == 1797
    assert len(d.y_val) == 360          # train_test_split rounds the held-out part up: ceil(0.2 * 1797)


def test_standardisation_is_fitted_on_the_training_split_only() -> None:
    d = load_dataset(DataConfig(source="wine", validation_fraction=0.3))
    np.testing.assert_allclose(d.x_train.mean(axis=0), 0.0, atol=1e-5)
    np.testing.assert_allclose(d.x_train.std(axis=0), 1.0, atol=1e-4)
    assert np.abs(d.x_val.mean(axis=0)).max() > 1e-3   # validation rows were not used to fit it


def test_split_is_stratified_and_seeded() -> None:
    a = load_dataset(DataConfig(source="iris", validation_fraction=0.2, split_seed=3))
    b = load_dataset(DataConfig(source="iris", validation_fraction=0.2, split_seed=3))
    c = load_dataset(DataConfig(source="iris", validation_fraction=0.2, split_seed=4))
    np.testing.assert_array_equal(a.x_train, b.x_train)
    assert not np.array_equal(a.x_train, c.x_train)
    assert np.bincount(a.y_val).tolist() == [10, 10, 10]   # iris: 50 per class, a fifth of each held out


def test_synthetic_scenario_is_seeded_and_needs_a_nonlinear_model() -> None:
    from sklearn.linear_model import LogisticRegression
    from sklearn.neural_network import MLPClassifier

    x, y = synthetic_scenario(1500, 32, 4, 4, 0.3, seed=1)
    x2, y2 = synthetic_scenario(1500, 32, 4, 4, 0.3, seed=1)
    np.testing.assert_array_equal(x, x2)
    np.testing.assert_array_equal(y, y2)
    assert set(np.unique(y)) == {0, 1, 2, 3}
    # reference library scikit-learn: a linear model cannot fit the labelling rule, a small MLP can
    linear = LogisticRegression(max_iter=3000).fit(x, y).score(x, y)
    mlp = MLPClassifier((64, 64), max_iter=1500, random_state=0).fit(x, y).score(x, y)
    assert linear < 0.85
    assert mlp > linear + 0.1


def _csv(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "readings.csv"
    p.write_text(text)
    return p


def test_csv_with_string_labels(tmp_path: Path) -> None:
    rows = "".join(f"{i},{i % 7 * 0.5},{'hot' if i % 2 else 'cold'}\n" for i in range(40))
    p = _csv(tmp_path, "temp,pressure,outcome\n" + rows)
    d = load_dataset(DataConfig(source="csv", path=str(p), label="outcome", validation_fraction=0.25))
    assert d.class_names == ("cold", "hot")
    assert d.n_features == 2 and len(d.y_train) == 30 and len(d.y_val) == 10


@pytest.mark.parametrize("text, pattern", [
    ("a,b,outcome\n1,2,x\n3,oops,y\n", r"readings\.csv line 3, column b: not a number: 'oops'"),
    ("a,b,outcome\n1,2,x\n3,4\n", r"readings\.csv line 3: 2 cells, header has 3"),
    ("a,b,result\n1,2,x\n", r"readings\.csv line 1: no label column 'outcome'"),
    ("", r"readings\.csv: empty file"),
    ("a,b,outcome\n", r"readings\.csv: no data rows"),
    ("a,b,outcome\n1,nan,x\n", r"line 2, column b: not a finite number"),
    ("a,b,outcome\n1,2,\n", r"line 2, column outcome: empty label"),
    ("a,b,outcome\n1,2,x\n3,4,x\n", r"needs at least two classes"),
])
def test_bad_csv_names_file_line_and_column(tmp_path: Path, text: str, pattern: str) -> None:
    p = _csv(tmp_path, text)
    with pytest.raises(DataError, match=pattern):
        load_dataset(DataConfig(source="csv", path=str(p), label="outcome"))


def test_npz_and_npy_pairs(tmp_path: Path) -> None:
    x, y = synthetic_scenario(200, 8, 2, 3, 0.3, seed=0)
    np.savez(tmp_path / "d.npz", X=x, y=y)
    d = load_dataset(DataConfig(source="npz", path=str(tmp_path / "d.npz"), label="y"))
    assert d.n_features == 8 and d.n_classes == 3
    np.save(tmp_path / "x.npy", x)
    np.save(tmp_path / "y.npy", y[:-1])
    with pytest.raises(DataError, match=r"labels must be 1-D with one per row \(200\)"):
        load_dataset(DataConfig(source="npy", path=str(tmp_path / "x.npy"), label_path=str(tmp_path / "y.npy")))
    with pytest.raises(DataError, match=r"no array 'labels'"):
        load_dataset(DataConfig(source="npz", path=str(tmp_path / "d.npz"), label="labels"))


def test_digits_as_images_keep_the_pixels_in_place() -> None:
    # scikit-learn documents load_digits' images as 8x8 arrays whose flattening is `data`
    from sklearn.datasets import load_digits

    d = load_dataset(DataConfig(source="digits_images", validation_fraction=0.0))
    assert d.image_shape == d.input_shape == (1, 8, 8) and d.n_classes == 10
    raw = load_digits().images.reshape(len(d.y_train), -1)
    # one mean and spread for the whole channel (common practice for images), not one per pixel
    expected = (raw - raw.mean()) / raw.std()
    np.testing.assert_allclose(d.x_train, expected, atol=1e-5)


def test_npz_images_of_shape_n_c_h_w(tmp_path: Path) -> None:
    rng = np.random.default_rng(0)
    x = rng.standard_normal((40, 2, 5, 4)).astype(np.float32)
    x[:, 1] = 10 + 3 * x[:, 1]
    np.savez(tmp_path / "imgs.npz", X=x, y=np.arange(40) % 2)
    d = load_dataset(DataConfig(source="npz", path=str(tmp_path / "imgs.npz"), label="y", validation_fraction=0.0))
    assert d.image_shape == (2, 5, 4) and d.x_train.shape == (40, 40)
    per_channel = d.x_train.reshape(40, 2, -1)
    np.testing.assert_allclose(per_channel.mean(axis=(0, 2)), 0.0, atol=1e-5)
    np.testing.assert_allclose(per_channel.std(axis=(0, 2)), 1.0, atol=1e-5)
    np.save(tmp_path / "bad.npy", np.zeros((4, 2, 3)))
    np.save(tmp_path / "lab.npy", np.arange(4))
    with pytest.raises(DataError, match=r"bad\.npy: features must be a numeric array of shape \(N, n_features\) "
                                        r"or images \(N, C, H, W\), got shape \(4, 2, 3\)"):
        load_dataset(DataConfig(source="npy", path=str(tmp_path / "bad.npy"), label_path=str(tmp_path / "lab.npy")))
