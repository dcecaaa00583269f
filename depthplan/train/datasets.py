"""Build seeded, deterministic train/validation arrays from a `DataConfig`.

Arrays are numpy (float32 features, int64 labels); the trainer turns them
into tensors. Standardisation is fitted on the training split only: per feature
for tables, per channel for images (rows of shape (C, H, W), stored flattened so
that minibatching is the same for every family; `Dataset.image_shape` says how to
fold a row back into an image).
"""
from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..config import DataConfig
from ..errors import DataError


@dataclass(frozen=True)
class Dataset:
    """A classification task split into training and validation parts."""

    x_train: np.ndarray   # (n_train, n_features) float32, standardised
    y_train: np.ndarray   # (n_train,) int64 in [0, n_classes)
    x_val: np.ndarray     # (n_val, n_features); n_val may be 0
    y_val: np.ndarray
    n_classes: int
    class_names: tuple[str, ...]
    description: str
    image_shape: tuple[int, int, int] | None = None   # (C, H, W) when every row is a flattened image

    @property
    def n_features(self) -> int:
        return int(self.x_train.shape[1])

    @property
    def input_shape(self) -> tuple[int, ...]:
        """The shape of one input row as a model sees it: (n_features,) or (C, H, W)."""
        return self.image_shape or (self.n_features,)


def synthetic_scenario(n_samples: int = 2000, n_features: int = 64, n_latent: int = 4,
                       n_classes: int = 4, noise: float = 0.5, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Invented scenario: a few latent factors folded nonlinearly into many noisy features.

    Each sample has `n_latent` standard-normal factors z. Every feature is a
    random smooth fold of them, tanh(a.z + b) * cos(c.z), plus Gaussian noise
    of size `noise`. The label is the class k maximising
    sin(2 u_k.z) + (v_k.z)(w_k.z): a rule of products and periodic terms
    that a linear model on the features cannot fit.

    Returns:
        (x, y): float32 features (n_samples, n_features), int64 labels.
    """
    rng = np.random.default_rng(seed)
    z = rng.standard_normal((n_samples, n_latent))
    a = rng.standard_normal((n_latent, n_features)) / math.sqrt(n_latent)
    b = rng.uniform(-1.0, 1.0, n_features)
    c = rng.standard_normal((n_latent, n_features)) * 0.5 / math.sqrt(n_latent)
    x = np.tanh(z @ a + b) * np.cos(z @ c)
    x += noise * rng.standard_normal(x.shape) * x.std(axis=0, keepdims=True)
    u, v, w = (rng.standard_normal((3, n_latent, n_classes)) / math.sqrt(n_latent))
    score = np.sin(2.0 * (z @ u)) + (z @ v) * (z @ w)
    y = score.argmax(axis=1)
    return x.astype(np.float32), y.astype(np.int64)


def _sklearn_dataset(name: str) -> tuple[np.ndarray, np.ndarray, tuple[str, ...]]:
    from sklearn import datasets as skd

    loader = {"digits": skd.load_digits, "iris": skd.load_iris, "wine": skd.load_wine,
              "breast_cancer": skd.load_breast_cancer}[name]
    bunch = loader()
    names = tuple(str(t) for t in getattr(bunch, "target_names", np.unique(bunch.target)))
    return bunch.data.astype(np.float32), bunch.target.astype(np.int64), names


def read_csv_table(path: Path, label: str) -> tuple[np.ndarray, np.ndarray, tuple[str, ...]]:
    """Read a CSV with a header; every column but `label` must be numeric.

    Raises:
        DataError: naming the file, line and column of the first bad cell.
    """
    path = Path(path)
    try:
        fh = path.open(newline="", encoding="utf-8-sig")
    except OSError as exc:
        raise DataError(f"{path}: cannot open ({exc.strerror})") from None
    with fh:
        reader = csv.reader(fh)
        try:
            header = [h.strip() for h in next(reader)]
        except StopIteration:
            raise DataError(f"{path}: empty file, expected a header line") from None
        except (csv.Error, UnicodeDecodeError) as exc:
            raise DataError(f"{path} line 1: not readable as CSV ({exc})") from None
        if label not in header:
            near = ", ".join(header[:8])
            raise DataError(f"{path} line 1: no label column '{label}' (columns: {near})")
        li = header.index(label)
        feats, labels = [], []
        try:
            for row in reader:
                line = reader.line_num
                if not row or all(not cell.strip() for cell in row):
                    continue
                if len(row) != len(header):
                    raise DataError(f"{path} line {line}: {len(row)} cells, header has {len(header)}")
                vals = []
                for j, cell in enumerate(row):
                    if j == li:
                        continue
                    try:
                        v = float(cell)
                    except ValueError:
                        raise DataError(f"{path} line {line}, column {header[j]}: not a number: {cell!r}") from None
                    if not math.isfinite(v):
                        raise DataError(f"{path} line {line}, column {header[j]}: not a finite number: {cell!r}")
                    vals.append(v)
                if not row[li].strip():
                    raise DataError(f"{path} line {line}, column {label}: empty label")
                feats.append(vals)
                labels.append(row[li].strip())
        except (csv.Error, UnicodeDecodeError) as exc:
            raise DataError(f"{path} line {reader.line_num}: not readable as CSV ({exc})") from None
    if len(header) < 2:
        raise DataError(f"{path} line 1: needs at least one feature column beside '{label}'")
    if not feats:
        raise DataError(f"{path}: no data rows under the header")
    y, names = encode_labels(labels)
    return np.asarray(feats, dtype=np.float32), y, names


def encode_labels(labels: list | np.ndarray) -> tuple[np.ndarray, tuple[str, ...]]:
    """Map labels (strings or numbers) to 0..C-1 in sorted order of their values."""
    arr = np.asarray(labels)
    if arr.dtype.kind in "iuf":
        classes, y = np.unique(arr, return_inverse=True)
    else:
        classes, y = np.unique(arr.astype(str), return_inverse=True)
    return y.astype(np.int64), tuple(str(c) for c in classes)


def _load_arrays(path: Path, cfg: DataConfig) -> tuple[np.ndarray, np.ndarray]:
    try:
        if cfg.source == "npz":
            with np.load(path, allow_pickle=False) as z:
                for key in (cfg.features, cfg.label):
                    if key not in z.files:
                        raise DataError(f"{path}: no array '{key}' (arrays: {', '.join(z.files)})")
                return np.asarray(z[cfg.features]), np.asarray(z[cfg.label])
        return np.load(path, allow_pickle=False), np.load(cfg.label_path, allow_pickle=False)
    except DataError:
        raise
    except (OSError, ValueError) as exc:
        raise DataError(f"{path}: not a readable {cfg.source} file ({exc})") from None


def load_dataset(cfg: DataConfig) -> Dataset:
    """Build the task described by `cfg`: load or generate, split, standardise.

    Raises:
        DataError: a file is missing, malformed, or the split is impossible.
    """
    image_shape: tuple[int, int, int] | None = None
    if cfg.source == "synthetic":
        x, y = synthetic_scenario(cfg.n_samples, cfg.n_features, cfg.n_latent,
                                  cfg.n_classes, cfg.noise, cfg.scenario_seed)
        names = tuple(f"class{k}" for k in range(cfg.n_classes))
        desc = (f"synthetic scenario: {cfg.n_samples} samples, {cfg.n_features} features from "
                f"{cfg.n_latent} latent factors, {cfg.n_classes} classes, noise {cfg.noise:g}")
    elif cfg.source == "digits_images":
        x, y, names = _sklearn_dataset("digits")
        image_shape = (1, 8, 8)
        desc = f"scikit-learn digits as 1x8x8 images: {len(y)} samples, {len(names)} classes"
    elif cfg.source in ("digits", "iris", "wine", "breast_cancer"):
        x, y, names = _sklearn_dataset(cfg.source)
        desc = f"scikit-learn {cfg.source}: {len(y)} samples, {x.shape[1]} features, {len(names)} classes"
    elif cfg.source == "csv":
        x, y, names = read_csv_table(Path(cfg.path), cfg.label)
        desc = f"{Path(cfg.path).name}: {len(y)} rows, {x.shape[1]} features, label '{cfg.label}'"
    else:
        path = Path(cfg.path)
        x, raw_y = _load_arrays(path, cfg)
        if x.ndim not in (2, 4) or x.dtype.kind not in "iuf" or 0 in x.shape[1:]:
            raise DataError(f"{path}: features must be a numeric array of shape (N, n_features) or images "
                            f"(N, C, H, W), got shape {x.shape} of {x.dtype}")
        if raw_y.ndim != 1 or len(raw_y) != len(x):
            raise DataError(f"{path}: labels must be 1-D with one per row ({len(x)}), got shape {raw_y.shape}")
        if not np.isfinite(x).all():
            row = int(np.argwhere(~np.isfinite(x))[0][0])
            raise DataError(f"{path}: features row {row} holds a non-finite value")
        y, names = encode_labels(raw_y)
        if x.ndim == 4:
            image_shape = (int(x.shape[1]), int(x.shape[2]), int(x.shape[3]))
            x = x.reshape(len(x), -1)
        x = x.astype(np.float32)
        desc = f"{path.name}: {len(y)} rows, " + (
            f"images {'x'.join(map(str, image_shape))}" if image_shape else f"{x.shape[1]} features")
    if len(names) < 2:
        raise DataError(f"{desc}: needs at least two classes, found {len(names)}")
    x_tr, y_tr, x_va, y_va = split(x, y, cfg.validation_fraction, cfg.split_seed, desc)
    if image_shape is None:
        mean = x_tr.mean(axis=0)
        std = x_tr.std(axis=0)
    else:   # one mean and spread per channel, over every training pixel: the image stays an image
        per_channel = x_tr.reshape(len(x_tr), image_shape[0], -1).astype(np.float64)
        pixels = image_shape[1] * image_shape[2]
        mean = np.repeat(per_channel.mean(axis=(0, 2)), pixels)
        std = np.repeat(per_channel.std(axis=(0, 2)), pixels)
    std[std < 1e-12] = 1.0
    x_tr = ((x_tr - mean) / std).astype(np.float32)
    x_va = ((x_va - mean) / std).astype(np.float32)
    return Dataset(x_tr, y_tr, x_va, y_va, len(names), names, desc, image_shape)


def split(x: np.ndarray, y: np.ndarray, fraction: float, seed: int, desc: str) -> tuple[np.ndarray, ...]:
    """Stratified, seeded train/validation split (`fraction` 0: no validation)."""
    if fraction <= 0:
        return x, y, x[:0], y[:0]
    from sklearn.model_selection import train_test_split

    try:
        x_tr, x_va, y_tr, y_va = train_test_split(x, y, test_size=fraction, random_state=seed, stratify=y)
    except ValueError as exc:
        raise DataError(f"{desc}: cannot split off a stratified validation part ({exc})") from None
    return x_tr, y_tr, x_va, y_va
