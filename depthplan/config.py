"""Read a sweep file, check every field, return frozen config dataclasses.

The only module that knows YAML exists. Every problem is collected with its key
path (`sweep.depths[2]: must be a positive integer, got 0`) and raised once as a
`ConfigError`, so a user fixes a file in one pass.
"""
from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any

import yaml

from .checks import (
    Checker,
    as_choice,
    as_flag,
    as_float,
    as_int,
    as_text,
    clip,
    int_list,
    show,
)
from .errors import ConfigError
from .urls import has_credentials

SOURCES = ("synthetic", "digits", "digits_images", "iris", "wine", "breast_cancer", "csv", "npz", "npy")
#: Sources whose rows may be images (C, H, W): what the conv family needs.
IMAGE_SOURCES = ("digits_images", "npz", "npy")
FAMILIES = ("mlp", "residual", "conv")
NORMS = ("none", "layer")
BRANCH_SCALES = ("1", "depth")
ACTIVATIONS = ("tanh", "relu", "gelu", "sigmoid")
INITS = ("default", "xavier", "glorot", "he", "kaiming", "orthogonal")
OPTIMIZERS = ("sgd", "adam")


@dataclass(frozen=True)
class DataConfig:
    source: str = "synthetic"
    path: str | None = None          # csv / npz / npy features file (absolute once loaded)
    label: str | None = None         # csv: label column name; npz: label array key
    features: str = "X"              # npz: features array key
    label_path: str | None = None    # npy: labels file
    validation_fraction: float = 0.2
    split_seed: int = 0
    # synthetic scenario
    n_samples: int = 2000
    n_features: int = 64
    n_latent: int = 4
    n_classes: int = 4
    noise: float = 0.3
    scenario_seed: int = 0


@dataclass(frozen=True)
class ModelConfig:
    width: int | tuple[int, ...] = 32
    activation: str = "tanh"
    init: str = "he"
    init_gain: float | None = None   # None: the activation's gain for he, 1 for the others
    # Families beside the plain MLP. Every new setting defaults to None, so the fingerprint of an
    # mlp sweep stored before they existed stays the same (None settings are left out of it).
    family: str | None = None        # mlp (None), residual, conv
    norm: str | None = None          # residual: none (None) or layer (LayerNorm before the activation)
    branch_scale: str | None = None  # residual: "1" (None) or "depth" (every branch times 1/sqrt(K))
    channels: int | None = None      # conv: channels of every block (None: model.width)
    factory: str | None = None       # "package.module:function" building the user's nn.Module
    factory_path: str | None = None  # folder the factory is imported from (the YAML file's folder)
    options: dict[str, Any] | None = None   # keyword arguments passed to the factory

    def widths(self, depth: int) -> tuple[int, ...]:
        """Hidden widths of a network with `depth` hidden layers."""
        if isinstance(self.width, int):
            return (self.width,) * depth
        return tuple(self.width[:depth])

    @property
    def family_name(self) -> str:
        """mlp, residual, conv, or factory (the user's own module)."""
        return "factory" if self.factory else (self.family or "mlp")

    def options_text(self) -> str:
        """The family's own settings in one line (`runs.csv` and the report name them); "" for an mlp."""
        name = self.family_name
        if name == "residual":
            return f"branch_scale={self.branch_scale or '1'}; norm={self.norm or 'none'}"
        if name == "conv":
            return f"channels={self.conv_channels}"
        if name == "factory":
            opts = json.dumps(self.options or {}, sort_keys=True, separators=(",", ":"))
            return f"{self.factory} {opts}"
        return ""

    @property
    def conv_channels(self) -> int:
        """Channels of every conv block: model.channels, else model.width."""
        if self.channels is not None:
            return self.channels
        return self.width if isinstance(self.width, int) else self.width[0]


@dataclass(frozen=True)
class AdaptiveConfig:
    """Depths chosen round by round to pin down the reversal depth."""

    low: int = 1                       # shallowest depth that may be swept
    high: int = 64                     # deepest depth that may be swept
    target_width: float = 2.0          # stop once the reversal depth's 95 % interval is this narrow (layers)
    max_rounds: int = 6
    cpu_budget_s: float | None = None  # stop once the sweep's training has used this much CPU time
    extra_seeds: int = 2               # seeds added per round where the spread of T is largest


@dataclass(frozen=True)
class SizeConfig:
    """One proxy or target size: a hidden width and/or a number of training rows (None: unset)."""

    width: int | None = None
    train_rows: int | None = None


@dataclass(frozen=True)
class TargetConfig:
    """The job to plan for: its width and training rows, and (for the report) its parameter count."""

    width: int | None = None
    train_rows: int | None = None
    n_params: int | None = None


@dataclass(frozen=True)
class SweepConfig:
    depths: tuple[int, ...] = (1, 2, 3, 4, 6, 8)   # with `adaptive`: the first round
    seeds: tuple[int, ...] = (0, 1, 2, 3, 4)
    seeds_per_cell: int | None = None  # None: all seeds of a depth train as one batch
    adaptive: AdaptiveConfig | None = None
    early_censor: float | None = None  # stop a run at this multiple of the best median T so far
    # proxy sizes (DESIGN.md section 8); None: one size, model.width on the whole training split
    widths: tuple[int, ...] | None = None       # hidden width of every layer, one proxy size each
    train_rows: tuple[int, ...] | None = None   # training rows drawn (stratified, seeded, nested)
    verify: SizeConfig | None = None            # one larger held-out proxy: predicted, then trained


@dataclass(frozen=True)
class ConvergeConfig:
    train_loss_below: float | None = None
    train_accuracy_at_least: float | None = None
    validation_accuracy_at_least: float | None = None


@dataclass(frozen=True)
class TuneConfig:
    """Per depth, search the learning rate on a log scale before the final seeds run."""

    low: float = 1e-3
    high: float = 1.0
    trials: int = 8
    seeds: int = 2          # seeds per tuning trial (seeds 1000, 1001, ...: apart from the final ones)
    penalty: float = 2.0    # a censored tuning run counts as penalty x max_updates, a diverged one twice that


@dataclass(frozen=True)
class TrainConfig:
    optimizer: str = "sgd"
    learning_rate: tuple[float, ...] = (0.05,)   # fixed rates (may be empty when `tune` is set)
    tune: TuneConfig | None = None
    momentum: float = 0.0
    batch_size: int = 32
    max_updates: int = 20000
    eval_every: int = 20
    eval_rows: int | None = None   # evaluate on this many fixed training rows (None: all of them)
    converge_when: ConvergeConfig = field(default_factory=lambda: ConvergeConfig(train_loss_below=0.1))


@dataclass(frozen=True)
class ProbeConfig:
    displacement: bool = True
    snr: bool = True
    n_points: int = 24        # log-spaced SNR probe steps between 1 and max_updates (displacement: 4x denser)
    snr_window: int = 16      # minibatch gradients drawn at the current weights per probe step
    # mutual information of each layer with input and label (off unless set; None keeps the
    # fingerprints of sweeps stored before these keys existed)
    information: bool | None = None
    information_bins: int | None = None     # equal-width bins per unit; None: INFORMATION_BINS

    @property
    def any(self) -> bool:
        """Whether any probe is recorded."""
        return bool(self.displacement or self.snr or self.information)

    @property
    def bins(self) -> int:
        """Bins of the information probe's binning estimator."""
        return self.information_bins or INFORMATION_BINS


#: Default bin count of the information probe (`probes.information_bins`).
INFORMATION_BINS = 30


@dataclass(frozen=True)
class OutputConfig:
    dir: str | None = None        # default: results/<name> beside the sweep file
    storage: str | None = None    # Optuna storage URL; default: SQLite file in the output folder


@dataclass(frozen=True)
class SweepFile:
    name: str
    data: DataConfig
    model: ModelConfig
    sweep: SweepConfig
    train: TrainConfig
    probes: ProbeConfig
    output: OutputConfig
    source_path: str = ""
    target: TargetConfig | None = None   # what the figures are carried to; changes no measurement

    def to_dict(self) -> dict[str, Any]:
        """The resolved config as plain data (what is written beside the results)."""
        d = asdict(self)
        d.pop("source_path")
        # write the adaptive-depth and tuning blocks back in the form the sweep file uses
        adaptive, tune = d["sweep"].pop("adaptive"), d["train"].pop("tune")
        if adaptive is not None:
            d["sweep"]["depths"] = adaptive
        if tune is not None:
            d["train"]["learning_rate"] = {**tune, "also_fixed": d["train"]["learning_rate"]}
        return json.loads(json.dumps(d))

    def fingerprint(self) -> str:
        """Hash of everything that changes what a run measures (not where it is written)."""
        d = self.to_dict()
        d.pop("output")
        d.pop("name")
        d.pop("target", None)
        # unset (None) settings are left out, so a setting added later with a None default
        # leaves the fingerprints of sweeps stored before it unchanged
        return hashlib.sha256(json.dumps(_without_none(d), sort_keys=True).encode()).hexdigest()[:16]


def _without_none(v: Any) -> Any:
    if isinstance(v, dict):
        return {k: _without_none(x) for k, x in v.items() if x is not None}
    return v


# --------------------------------------------------------------------------- sections

def _data(c: Checker, raw: Any, base: Path) -> DataConfig:
    d = c.keys("data", raw, tuple(DataConfig.__dataclass_fields__))
    dflt = DataConfig()
    source = c.take(d, "data", "source", as_choice(SOURCES), dflt.source)
    kw: dict[str, Any] = {"source": source}
    for key in ("path", "label", "label_path", "features"):
        kw[key] = c.take(d, "data", key, as_text, getattr(dflt, key))
    for key in ("path", "label_path"):
        if kw[key] is not None:
            p = Path(kw[key]).expanduser()
            kw[key] = str(p if p.is_absolute() else (base / p).resolve())
    kw["validation_fraction"] = c.take(d, "data", "validation_fraction", as_float(0.0, 0.9, lo_open=False), dflt.validation_fraction)
    kw["split_seed"] = c.take(d, "data", "split_seed", as_int(0), dflt.split_seed)
    for key in ("n_samples", "n_features", "n_latent"):
        kw[key] = c.take(d, "data", key, as_int(), getattr(dflt, key))
    kw["n_classes"] = c.take(d, "data", "n_classes", as_int(2), dflt.n_classes)
    kw["noise"] = c.take(d, "data", "noise", as_float(0.0, lo_open=False), dflt.noise)
    kw["scenario_seed"] = c.take(d, "data", "scenario_seed", as_int(0), dflt.scenario_seed)
    if source in ("csv", "npz", "npy") and kw["path"] is None:
        c.add("data.path", f"is required when data.source is {source}")
    if source == "csv" and kw["label"] is None:
        c.add("data.label", "is required when data.source is csv (the name of the label column)")
    if source == "npy" and kw["label_path"] is None:
        c.add("data.label_path", "is required when data.source is npy (the labels .npy file)")
    if source == "npz" and kw["label"] is None:
        kw["label"] = "y"
    for key in ("path", "label_path"):
        if kw[key] is not None and source in ("csv", "npz", "npy") and not Path(kw[key]).is_file():
            c.add(f"data.{key}", f"no such file: {clip(str(kw[key]))}")
    return DataConfig(**kw)


def _factory_name(v: Any) -> str:
    """"package.module:function" (identifiers separated by dots, one colon)."""
    text = as_text(v).strip()
    mod, _, fn = text.partition(":")
    if not (mod and fn and all(p.isidentifier() for p in mod.split(".")) and fn.isidentifier()):
        raise ValueError(f'must be "package.module:function", got {show(v)}')
    return text


def _options(v: Any) -> dict[str, Any]:
    """A mapping of keyword arguments with plain YAML values (numbers, text, flags, lists)."""
    if not isinstance(v, dict):
        raise ValueError(f"must be a mapping of keyword arguments for model.factory, got {show(v)}")
    bad = [k for k in v if not isinstance(k, str) or not k.isidentifier()]
    if bad:
        raise ValueError(f"keys must be Python names, got {show(bad[0])}")
    reserved = sorted({"depth", "n_inputs", "n_classes"} & set(v))
    if reserved:
        raise ValueError(f"must not set {', '.join(reserved)} (depthplan passes them), got {show(v)}")
    return json.loads(json.dumps(v))


def _model(c: Checker, raw: Any, base: Path) -> ModelConfig:
    d = c.keys("model", raw, tuple(ModelConfig.__dataclass_fields__))
    dflt = ModelConfig()
    width: Any = dflt.width
    if "width" in d:
        if isinstance(d["width"], list):
            width = int_list(c, "model.width", d["width"], unique=False) or dflt.width
        else:
            width = c.take(d, "model", "width", as_int(), dflt.width)
    family = c.take(d, "model", "family", as_choice(FAMILIES), None)
    norm = c.take(d, "model", "norm", as_choice(NORMS), None)
    scale = d.get("branch_scale")
    scale = c.take(d, "model", "branch_scale", as_choice(BRANCH_SCALES), None) if scale != 1 else "1"
    factory = c.take(d, "model", "factory", _factory_name, None)
    path = c.take(d, "model", "factory_path", as_text, None)
    m = ModelConfig(
        width=width,
        activation=c.take(d, "model", "activation", as_choice(ACTIVATIONS), dflt.activation),
        init=c.take(d, "model", "init", as_choice(INITS), dflt.init),
        init_gain=c.take(d, "model", "init_gain", as_float(), None),
        family=None if family == "mlp" else family,
        norm=None if norm == "none" else norm,
        branch_scale=None if scale == "1" else scale,
        channels=c.take(d, "model", "channels", as_int(), None),
        factory=factory,
        factory_path=(str(_resolved(path, base)) if path is not None else str(base.resolve())) if factory else None,
        options=c.take(d, "model", "options", _options, None),
    )
    _model_combinations(c, d, m)
    return m


def _resolved(path: str, base: Path) -> Path:
    p = Path(path).expanduser()
    return p if p.is_absolute() else (base / p).resolve()


def _model_combinations(c: Checker, d: dict[str, Any], m: ModelConfig) -> None:
    """Keys that belong to one family only, and a factory beside a built-in family."""
    name = m.family_name
    if m.factory and d.get("family") not in (None, "mlp"):
        c.add("model.family", f"must be left out when model.factory is set (the factory builds the model), got {show(d['family'])}")
    for key, owner in (("norm", "residual"), ("branch_scale", "residual"), ("channels", "conv")):
        if getattr(m, key) is not None and name != owner:     # the neutral norm: none, branch_scale: 1 pass
            c.add(f"model.{key}", f"applies to model.family {owner} only; this model is {name}")
    for key in ("options", "factory_path"):
        if d.get(key) is not None and not m.factory:
            c.add(f"model.{key}", "applies only with model.factory")
    if m.factory_path is not None and not Path(m.factory_path).is_dir():
        c.add("model.factory_path", f"no such folder: {clip(m.factory_path)}")
    if name == "residual" and not isinstance(m.width, int):
        c.add("model.width", f"must be one integer for model.family residual (every block has the same width), got {show(d.get('width'))}")


def geometric_depths(low: int, high: int, n: int = 5) -> tuple[int, ...]:
    """About `n` depths spread evenly in log from low to high (both included)."""
    raw = [low * (high / low) ** (i / (n - 1)) for i in range(n)]
    return tuple(sorted({max(low, min(high, round(v))) for v in raw}))


def _adaptive(c: Checker, raw: dict) -> AdaptiveConfig:
    d = c.keys("sweep.depths", raw, tuple(AdaptiveConfig.__dataclass_fields__))
    dflt = AdaptiveConfig()
    a = AdaptiveConfig(
        low=c.take(d, "sweep.depths", "low", as_int(), dflt.low),
        high=c.take(d, "sweep.depths", "high", as_int(), dflt.high),
        target_width=c.take(d, "sweep.depths", "target_width", as_float(), dflt.target_width),
        max_rounds=c.take(d, "sweep.depths", "max_rounds", as_int(), dflt.max_rounds),
        cpu_budget_s=c.take(d, "sweep.depths", "cpu_budget_s", as_float(), None),
        extra_seeds=c.take(d, "sweep.depths", "extra_seeds", as_int(0), dflt.extra_seeds),
    )
    if a.high < a.low + 3:
        c.add("sweep.depths.high", f"must be at least low + 3 ({a.low + 3}) for an adaptive sweep, got {a.high}")
    return a


def _sweep(c: Checker, raw: Any) -> SweepConfig:
    d = c.keys("sweep", raw, tuple(f for f in SweepConfig.__dataclass_fields__ if f != "adaptive"))
    dflt = SweepConfig()
    adaptive = None
    if isinstance(d.get("depths"), dict):
        adaptive = _adaptive(c, d["depths"])
        depths = geometric_depths(adaptive.low, max(adaptive.low + 3, adaptive.high // 2))
    else:
        depths = int_list(c, "sweep.depths", d["depths"]) if "depths" in d else dflt.depths
    seeds: Any = dflt.seeds
    if "seeds" in d:
        s = d["seeds"]
        if isinstance(s, list):
            seeds = int_list(c, "sweep.seeds", s, lo=0) or dflt.seeds
        else:
            n = c.take(d, "sweep", "seeds", as_int(), None)
            seeds = tuple(range(n)) if n else dflt.seeds
    per_cell = c.take(d, "sweep", "seeds_per_cell", as_int(), None)
    early = c.take(d, "sweep", "early_censor", as_float(1.0, lo_open=True), None)
    return SweepConfig(depths=tuple(sorted(depths or dflt.depths)), seeds=seeds, seeds_per_cell=per_cell,
                       adaptive=adaptive, early_censor=early, **_size_axes(c, d))


def _tune(c: Checker, raw: dict) -> tuple[TuneConfig, tuple[float, ...]]:
    path = "train.learning_rate"
    d = c.keys(path, raw, (*TuneConfig.__dataclass_fields__, "also_fixed"))
    dflt = TuneConfig()
    t = TuneConfig(
        low=c.take(d, path, "low", as_float(), dflt.low),
        high=c.take(d, path, "high", as_float(), dflt.high),
        trials=c.take(d, path, "trials", as_int(2), dflt.trials),
        seeds=c.take(d, path, "seeds", as_int(), dflt.seeds),
        penalty=c.take(d, path, "penalty", as_float(1.0, lo_open=False), dflt.penalty),
    )
    if t.high <= t.low:
        c.add(f"{path}.high", f"must be above low ({t.low:g}), got {t.high:g}")
    fixed: list[float] = []
    for i, x in enumerate(d.get("also_fixed") or []):
        try:
            fixed.append(as_float()(x))
        except ValueError as exc:
            c.add(f"{path}.also_fixed[{i}]", str(exc))
    if "also_fixed" in d and not isinstance(d["also_fixed"], list):
        c.add(f"{path}.also_fixed", f"must be a list of rates, got {show(d['also_fixed'])}")
    return t, tuple(fixed)


def _train(c: Checker, raw: Any) -> TrainConfig:
    d = c.keys("train", raw, tuple(f for f in TrainConfig.__dataclass_fields__ if f != "tune"))
    dflt = TrainConfig()
    lr: Any = dflt.learning_rate
    tune = None
    if isinstance(d.get("learning_rate"), dict):
        tune, lr = _tune(c, d["learning_rate"])
    elif "learning_rate" in d:
        v = d["learning_rate"]
        if isinstance(v, list) and v:
            vals = []
            for i, x in enumerate(v):
                try:
                    vals.append(as_float()(x))
                except ValueError as exc:
                    c.add(f"train.learning_rate[{i}]", str(exc))
            if len(set(vals)) != len(vals):
                c.add("train.learning_rate", f"must not repeat a value, got {show(v)}")
            lr = tuple(vals) if vals else lr
        else:
            one = c.take(d, "train", "learning_rate", as_float(), None)
            lr = (one,) if one is not None else lr
    cw_raw = d.get("converge_when", None)
    cw = c.keys("train.converge_when", cw_raw, tuple(ConvergeConfig.__dataclass_fields__))
    conv = dflt.converge_when
    if "converge_when" in d:
        conv = ConvergeConfig(
            train_loss_below=c.take(cw, "train.converge_when", "train_loss_below", as_float(), None),
            train_accuracy_at_least=c.take(cw, "train.converge_when", "train_accuracy_at_least", as_float(0.0, 1.0), None),
            validation_accuracy_at_least=c.take(cw, "train.converge_when", "validation_accuracy_at_least", as_float(0.0, 1.0), None),
        )
        if isinstance(cw_raw, dict) and all(v is None for v in asdict(conv).values()):
            c.add("train.converge_when", "must set at least one of train_loss_below, train_accuracy_at_least, validation_accuracy_at_least")
    t = TrainConfig(
        optimizer=c.take(d, "train", "optimizer", as_choice(OPTIMIZERS), dflt.optimizer),
        learning_rate=lr,
        tune=tune,
        momentum=c.take(d, "train", "momentum", as_float(0.0, 1.0, lo_open=False, hi_open=True), dflt.momentum),
        batch_size=c.take(d, "train", "batch_size", as_int(), dflt.batch_size),
        max_updates=c.take(d, "train", "max_updates", as_int(), dflt.max_updates),
        eval_every=c.take(d, "train", "eval_every", as_int(), dflt.eval_every),
        eval_rows=c.take(d, "train", "eval_rows", as_int(), None),
        converge_when=conv,
    )
    if t.eval_every > t.max_updates:
        c.add("train.eval_every", f"must not exceed train.max_updates ({t.max_updates}), got {t.eval_every}")
    return t


def _probes(c: Checker, raw: Any) -> ProbeConfig:
    d = c.keys("probes", raw, tuple(ProbeConfig.__dataclass_fields__))
    dflt = ProbeConfig()
    return ProbeConfig(
        displacement=c.take(d, "probes", "displacement", as_flag, dflt.displacement),
        snr=c.take(d, "probes", "snr", as_flag, dflt.snr),
        n_points=c.take(d, "probes", "n_points", as_int(2), dflt.n_points),
        snr_window=c.take(d, "probes", "snr_window", as_int(2), dflt.snr_window),
        information=c.take(d, "probes", "information", as_flag, None) or None,   # false: as unset
        information_bins=c.take(d, "probes", "information_bins", as_int(2), None),
    )


# --------------------------------------------------------------------------- proxy sizes and target

def _size_axes(c: Checker, d: dict) -> dict[str, Any]:
    """sweep.widths, sweep.train_rows and sweep.verify (each None when not given)."""
    out: dict[str, Any] = {}
    for key in ("widths", "train_rows"):
        out[key] = None if d.get(key) is None else int_list(c, f"sweep.{key}", d[key])
        if out[key] is not None:
            out[key] = tuple(sorted(out[key]))
    out["verify"] = None
    if d.get("verify") is not None:
        v = c.keys("sweep.verify", d["verify"], tuple(SizeConfig.__dataclass_fields__))
        out["verify"] = SizeConfig(width=c.take(v, "sweep.verify", "width", as_int(), None),
                                   train_rows=c.take(v, "sweep.verify", "train_rows", as_int(), None))
        if isinstance(d["verify"], dict) and not any(k in v for k in SizeConfig.__dataclass_fields__):
            c.add("sweep.verify", "must give width or train_rows (the larger proxy held out of the transfer fit)")
    return out


def _target(c: Checker, raw: Any) -> TargetConfig | None:
    if raw is None:
        return None
    d = c.keys("target", raw, tuple(TargetConfig.__dataclass_fields__))
    t = TargetConfig(width=c.take(d, "target", "width", as_int(), None),
                     train_rows=c.take(d, "target", "train_rows", as_int(), None),
                     n_params=c.take(d, "target", "n_params", as_int(), None))
    if isinstance(raw, dict) and "width" not in d and "train_rows" not in d:
        c.add("target", "must give width and/or train_rows (the job to plan for)")
    return t


def _check_sizes(c: Checker, cfg: SweepFile) -> None:
    """What the sweep file alone can tell about its proxy sizes, held-out size and target."""
    s = cfg.sweep
    axes = {"width": s.widths, "train_rows": s.train_rows}
    named = [f"sweep.{k}" for k, v in (("widths", s.widths), ("train_rows", s.train_rows)) if v]
    if named and s.adaptive is not None:
        c.add(named[0], "cannot be combined with an adaptive sweep.depths block in this version; list the depths")
    if named and cfg.train.tune is not None:
        c.add(named[0], "cannot be combined with the train.learning_rate tuning block in this version; "
                        "give one or more fixed rates")
    if s.widths and isinstance(cfg.model.width, tuple):
        c.add("sweep.widths", "cannot be combined with a list of per-layer widths in model.width")
    plural = {"width": "widths", "train_rows": "train_rows"}
    if s.verify is not None:
        for axis in ("width", "train_rows"):
            value, swept = getattr(s.verify, axis), axes[axis]
            if value is None:
                continue
            if not swept or len(swept) < 2:
                c.add(f"sweep.verify.{axis}", f"needs sweep.{plural[axis]} with two or more values to predict it from")
            elif value <= max(swept):
                where = "is one of" if value in swept else "lies inside" if value > min(swept) else "is below"
                c.add(f"sweep.verify.{axis}", f"{value} {where} the swept {plural[axis]} ({min(swept)} to "
                      f"{max(swept)}); the held-out size must be larger than every swept one")
    t = cfg.target
    if t is None:
        return
    n_sizes = len(s.widths or (0,)) * len(s.train_rows or (0,))
    if n_sizes < 2:
        c.add("target", "one proxy size only (sweep.widths and sweep.train_rows give one size); a target needs "
                        "proxies at two or more sizes to carry the depth law along size")
        return
    fixed = {"width": cfg.model.width if isinstance(cfg.model.width, int) else None, "train_rows": None}
    for axis in ("width", "train_rows"):
        value, swept = getattr(t, axis), axes[axis]
        if value is None:
            continue
        if not swept or len(swept) < 2:
            if value != (swept[0] if swept else fixed[axis]):
                c.add(f"target.{axis}", f"the proxies do not vary sweep.{plural[axis]}, so nothing carries the "
                      f"law along {axis}; add sweep.{plural[axis]} (two or more values) or drop target.{axis}")
        elif value < min(swept):
            c.add(f"target.{axis}", f"{value} is smaller than every proxy ({min(swept)} to {max(swept)}); "
                                    "plan from the proxy itself")


def _holds_credentials(url: str) -> bool:
    """A user name or password in the authority, or a password/secret/token query key."""
    return ("://" in url and "@" in url.split("://", 1)[1].split("/", 1)[0]) or has_credentials(url)


def _output(c: Checker, raw: Any, base: Path) -> OutputConfig:
    d = c.keys("output", raw, tuple(OutputConfig.__dataclass_fields__))
    out = c.take(d, "output", "dir", as_text, None)
    if out is not None and not Path(out).expanduser().is_absolute():
        out = str((base / out).resolve())
    storage = c.take(d, "output", "storage", as_text, None)
    if storage is not None and _holds_credentials(storage):
        c.add("output.storage", "must not hold credentials; set DEPTHPLAN_STORAGE in the environment or pass --storage")
    return OutputConfig(dir=out, storage=storage)


TOP_KEYS = ("name", "data", "model", "sweep", "train", "probes", "output", "target")


def parse_config(raw: Any, *, base_dir: Path, where: str = "sweep file") -> SweepFile:
    """Check a parsed YAML mapping and return the frozen config.

    Args:
        raw: what `yaml.safe_load` returned.
        base_dir: folder that relative paths in the file are taken from.
        where: the file name used in the error summary.

    Raises:
        ConfigError: listing every problem, one per line, each with its key path.
    """
    c = Checker()
    top = c.keys("", raw, TOP_KEYS)
    if not isinstance(raw, dict):
        raise ConfigError(f"{where}: must be a YAML mapping with keys {', '.join(TOP_KEYS)}")
    name = c.take(top, "", "name", as_text, None)
    if name is None and "name" not in top:
        c.add("name", "is required (it names the results folder)")
    elif name is not None and any(ch in name for ch in "/\\") or name in (".", ".."):
        c.add("name", f"must be usable as a folder name, got {show(name)}")
    cfg = SweepFile(
        name=name or "",
        data=_data(c, top.get("data"), base_dir),
        model=_model(c, top.get("model"), base_dir),
        sweep=_sweep(c, top.get("sweep")),
        train=_train(c, top.get("train")),
        probes=_probes(c, top.get("probes")),
        output=_output(c, top.get("output"), base_dir),
        source_path=str(where),
        target=_target(c, top.get("target")),
    )
    if cfg.output.dir is None and name:
        # the default folder lies beside the sweep file, whatever the working directory
        cfg = replace(cfg, output=replace(cfg.output, dir=str((base_dir / "results" / name).resolve())))
    if cfg.model.family == "conv" and cfg.data.source not in IMAGE_SOURCES:
        c.add("model.family", f"conv needs image rows (data.source {', '.join(IMAGE_SOURCES)}: digits as 1x8x8 "
                              f"images, or arrays of shape (N, C, H, W)), got data.source {cfg.data.source}")
    _check_sizes(c, cfg)
    if cfg.model.family_name == "mlp" and isinstance(cfg.model.width, tuple) and len(cfg.model.width) < max(cfg.sweep.depths):
        c.add("model.width", f"lists {len(cfg.model.width)} widths but sweep.depths goes to {max(cfg.sweep.depths)}")
    if c.problems:
        n = len(c.problems)
        head = f"{n} problem{'s' if n > 1 else ''} in {Path(where).name}: "
        raise ConfigError(head + "; ".join(c.problems))
    return cfg


#: Limits on a sweep file: bytes, aliases (`*name`), and nodes once aliases are expanded. A real
#: sweep file is a few hundred bytes with a handful of anchors; the limits stop "billion laughs"
#: documents (nested aliases that expand exponentially) before they are built or echoed.
MAX_FILE_BYTES = 1_000_000
MAX_ALIASES = 100
MAX_NODES = 100_000


class _TooBig(Exception):
    """A YAML document over one of the limits above (the text says which)."""


class _BoundedLoader(yaml.SafeLoader):
    """SafeLoader that refuses more than MAX_ALIASES aliases while composing."""

    def __init__(self, stream: str) -> None:
        super().__init__(stream)
        self._aliases = 0

    def compose_node(self, parent: Any, index: Any) -> Any:
        if self.check_event(yaml.AliasEvent):
            self._aliases += 1
            if self._aliases > MAX_ALIASES:
                mark = self.peek_event().start_mark
                raise _TooBig(f"line {mark.line + 1}: more than {MAX_ALIASES} aliases (*name); "
                              "write the values out instead")
        return super().compose_node(parent, index)


def _expanded_size(root: yaml.Node) -> int:
    """Nodes in the document once every alias is expanded (shared nodes counted each time used).

    A scalar counts once more per 64 characters, so an aliased long string is not free.
    Iterative and memoized, so it costs one visit per distinct node; refuses a node
    that contains itself and stops counting past MAX_NODES.
    """
    size: dict[int, int] = {}
    open_: set[int] = set()
    stack: list[tuple[yaml.Node, bool]] = [(root, False)]
    while stack:
        node, done = stack.pop()
        key = id(node)
        if isinstance(node, yaml.MappingNode):
            kids = [n for pair in node.value for n in pair]
        elif isinstance(node, yaml.SequenceNode):
            kids = list(node.value)
        else:
            kids = []
        if done:
            own = 1 + len(node.value) // 64 if isinstance(node, yaml.ScalarNode) else 1
            open_.discard(key)
            size[key] = min(MAX_NODES + 1, own + sum(size[id(k)] for k in kids))
            continue
        if key in size:
            continue
        if key in open_:
            raise _TooBig(f"line {node.start_mark.line + 1}: an alias refers to a value that contains it")
        open_.add(key)
        stack.append((node, True))
        for kid in kids:
            if id(kid) in open_:
                raise _TooBig(f"line {kid.start_mark.line + 1}: an alias refers to a value that contains it")
            if id(kid) not in size:
                stack.append((kid, False))
    return size[id(root)]


def _load_yaml(text: str) -> Any:
    """yaml.safe_load within the limits above (raises _TooBig or yaml.YAMLError)."""
    loader = _BoundedLoader(text)
    try:
        node = loader.get_single_node()
        if node is None:
            return None
        if _expanded_size(node) > MAX_NODES:
            raise _TooBig(f"expands to more than {MAX_NODES} values once its aliases (*name) are filled in")
        return loader.construct_document(node)
    finally:
        loader.dispose()


def load_config(path: str | Path) -> SweepFile:
    """Read and check a YAML sweep file.

    Raises:
        ConfigError: the file is missing, is not YAML, or any key is wrong.
    """
    p = Path(path)
    if not p.is_file():
        raise ConfigError(f"{p}: no such sweep file")
    try:
        with p.open("rb") as fh:
            data = fh.read(MAX_FILE_BYTES + 1)
    except OSError as exc:
        raise ConfigError(f"{p}: cannot read the sweep file ({exc.strerror or type(exc).__name__})") from None
    if len(data) > MAX_FILE_BYTES:
        raise ConfigError(f"{p}: larger than {MAX_FILE_BYTES // 1_000_000} MB; a sweep file is a few hundred bytes")
    try:
        raw = _load_yaml(data.decode("utf-8"))
    except _TooBig as exc:
        raise ConfigError(f"{p}: refused, {exc}") from None
    except RecursionError:
        raise ConfigError(f"{p}: refused, values nested too deeply") from None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        at = f" line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        problem = getattr(exc, "problem", None) or str(exc).splitlines()[0]
        raise ConfigError(f"{p}:{at}: not valid YAML ({clip(str(problem), 120)})") from None
    except UnicodeDecodeError:
        raise ConfigError(f"{p}: not a text file") from None
    return parse_config(raw, base_dir=p.resolve().parent, where=str(p))


def config_from_dict(d: dict[str, Any], *, base_dir: Path | None = None) -> SweepFile:
    """Build a config from a resolved dict (as written beside results)."""
    return parse_config(d, base_dir=base_dir or Path.cwd(), where="resolved config")


def dump_config(cfg: SweepFile) -> str:
    """The resolved config as YAML text."""
    return yaml.safe_dump(cfg.to_dict(), sort_keys=False)
