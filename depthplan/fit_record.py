"""FitResult: the typed, frozen form of fit.json, shared by the fit, the report and the CLI.

`FitResult.from_dict(json.loads(text))` reads a fit.json and `to_dict()` gives back the same
object, key for key and in the same order, so `json.dumps(r.to_dict(), indent=2)` reproduces the
file byte for byte. Each block is a record of its own with attributes for the fields the schema
documents (docs/fit-json.md); a field the file does not carry stays `ABSENT` and is not written
back, and a key this version does not know is kept in `extra`, so nothing a newer writer added is
lost on the way through.
"""
from __future__ import annotations

import dataclasses
import types
import typing
from dataclasses import dataclass, field
from typing import Any, ClassVar, Mapping, TypeVar

from .records import ReversalStatus

__all__ = ["ABSENT", "given", "Record", "FitResult", "FitGroup", "PowerLaw", "Reversal", "Planning",
           "PlannedDepth", "Diffusion", "DiffusionLayer", "DiffusionDepth", "LateWindow", "Curve", "DepthRow", "Bootstrap",
           "GroupLabel", "FitInput", "LrInteraction", "Transfer", "TransferTarget", "LackOfFit", "ModelFit",
           "Models", "StuckRun", "TransferVerify"]


class _Absent:
    """A field the file did not carry (distinct from null, which is None)."""

    _instance: ClassVar[_Absent | None] = None

    def __new__(cls) -> _Absent:
        if cls._instance is None:
            cls._instance = super().__new__(cls)
        return cls._instance

    def __repr__(self) -> str:
        return "ABSENT"

    def __bool__(self) -> bool:
        return False


ABSENT: Any = _Absent()


def given(v: Any) -> bool:
    """True when a field holds a value: neither null (None) nor left out of the file (ABSENT)."""
    return v is not None and v is not ABSENT

R = TypeVar("R", bound="Record")


def _record_type(annotation: Any) -> tuple[str, type[Record] | None]:
    """('one' | 'list' | '', record class) for a field annotation naming a Record."""
    args = typing.get_args(annotation)
    origin = typing.get_origin(annotation)
    if isinstance(annotation, type) and issubclass(annotation, Record):
        return "one", annotation
    if origin in (list, tuple) and args and isinstance(args[0], type) and issubclass(args[0], Record):
        return "list", args[0]
    if origin in (typing.Union, types.UnionType):
        for a in args:
            kind, cls = _record_type(a)
            if cls is not None:
                return kind, cls
    return "", None


@dataclass(frozen=True)
class Record:
    """A frozen block of fit.json: typed fields, the key order it was read in, unknown keys kept."""

    extra: dict[str, Any] = field(default_factory=dict, repr=False, compare=False, kw_only=True)
    key_order: tuple[str, ...] = field(default=(), repr=False, compare=False, kw_only=True)

    @classmethod
    def _fields(cls) -> dict[str, dataclasses.Field]:
        return {f.name: f for f in dataclasses.fields(cls) if f.name not in ("extra", "key_order")}

    @classmethod
    def from_dict(cls: type[R], d: Mapping[str, Any]) -> R:
        hints = typing.get_type_hints(cls)
        known = cls._fields()
        kw: dict[str, Any] = {}
        for name in known:
            if name not in d:
                kw[name] = ABSENT
                continue
            value = d[name]
            kind, sub = _record_type(hints[name])
            if sub is not None and kind == "one" and isinstance(value, Mapping):
                value = sub.from_dict(value)
            elif sub is not None and kind == "list" and isinstance(value, list):
                value = [sub.from_dict(v) if isinstance(v, Mapping) else v for v in value]
            kw[name] = value
        extra = {k: v for k, v in d.items() if k not in known}
        return cls(**kw, extra=extra, key_order=tuple(d))

    def to_dict(self) -> dict[str, Any]:
        """The block as JSON-ready data, keys in the order they were read (field order if built)."""
        values = {name: getattr(self, name) for name in self._fields()}
        values.update(self.extra)
        order = list(self.key_order) + [k for k in values if k not in self.key_order]
        out: dict[str, Any] = {}
        for k in order:
            v = values.get(k, ABSENT)
            if v is ABSENT:
                continue
            if isinstance(v, Record):
                v = v.to_dict()
            elif isinstance(v, list):
                v = [x.to_dict() if isinstance(x, Record) else x for x in v]
            out[k] = v
        return out


def _absent() -> Any:
    return field(default=ABSENT)


@dataclass(frozen=True)
class GroupLabel(Record):
    lr_mode: str = _absent()
    learning_rate: float | None = _absent()
    n_runs: int = _absent()


@dataclass(frozen=True)
class DepthRow(Record):
    depth: int = _absent()
    runs: int = _absent()
    converged: int = _absent()
    censored: int = _absent()
    diverged: int = _absent()
    median: float | None = _absent()
    q25: float | None = _absent()
    q75: float | None = _absent()
    median_note: str = _absent()
    quartile_note: str = _absent()
    budget: int | None = _absent()
    seconds_per_update: float | None = _absent()
    validation_accuracy: float | None = _absent()
    validation_accuracy_lo: float | None = _absent()
    validation_accuracy_hi: float | None = _absent()
    validation_accuracy_spread: str | None = _absent()
    stuck: int = _absent()
    stuck_rate: float | None = _absent()


@dataclass(frozen=True)
class LackOfFit(Record):
    checked: bool = _absent()
    p_value: float | None = _absent()
    missed_depths: list[int] = _absent()


@dataclass(frozen=True)
class ModelFit(Record):
    """One candidate model of `models.candidates`."""

    model: str = _absent()
    n_params: int = _absent()
    loglik: float | None = _absent()
    aicc: float | None = _absent()
    delta_aicc: float | None = _absent()
    weight: float = _absent()
    bootstrap_share: float | None = _absent()
    params: dict[str, float] = _absent()
    k_star: float | None = _absent()
    last_depth_worth_adding: int | None = _absent()
    compute_optimal_depth: int | None = _absent()
    recommended_depth: int | None = _absent()
    lack_of_fit: LackOfFit = _absent()


@dataclass(frozen=True)
class Models(Record):
    """fit.json `models`: the candidates compared by AICc and the one chosen."""

    criterion: str = _absent()
    chosen: str = _absent()
    depths_used: list[int] = _absent()
    n_runs: int = _absent()
    candidates: list[ModelFit] = _absent()

    def get(self, name: str) -> ModelFit | None:
        return next((c for c in self.candidates or [] if c.model == name), None)


@dataclass(frozen=True)
class StuckRun(Record):
    depth: int = _absent()
    seed: int = _absent()
    budget: int = _absent()


@dataclass(frozen=True)
class PowerLaw(Record):
    slope: float | None = _absent()
    slope_se: float | None = _absent()
    slope_ci: list[float | None] = _absent()
    slope_ci_analytic: list[float | None] = _absent()
    intercept: float | None = _absent()
    intercept_se: float | None = _absent()
    cov: list[list[float]] = _absent()
    sigma: float | None = _absent()
    r2: float | None = _absent()
    loglik: float | None = _absent()
    method: str = _absent()
    converged: bool = _absent()
    depths_used: list[int] = _absent()
    n_runs: int = _absent()
    n_censored: int = _absent()
    ci_method: str = _absent()
    n_boot_failed: int = _absent()
    alpha: float | None = _absent()
    alpha_ci: list[float | None] = _absent()
    without_shallowest: PowerLaw | None = _absent()
    lack_of_fit: LackOfFit = _absent()


@dataclass(frozen=True)
class Reversal(Record):
    status: str = _absent()
    depth: float | None = _absent()
    depth_ci: list[float | None] | None = _absent()
    falling_slope: float | None = _absent()
    rising_slope: float | None = _absent()
    rising_slope_ci: list[float | None] | None = _absent()
    bic_single: float | None = _absent()
    bic_segmented: float | None = _absent()
    n_depths_past: int | None = _absent()
    smooth_depth: float | None = _absent()
    smooth_model: dict[str, float] | None = _absent()
    rise_suspected: bool = _absent()
    model: str | None = _absent()
    breakpoint: float | None = _absent()
    note: str = _absent()

    @property
    def observed(self) -> bool:
        return self.status == ReversalStatus.OBSERVED


@dataclass(frozen=True)
class PlannedDepth(Record):
    depth: float | None = _absent()
    ci: list[float | None] | None = _absent()
    extrapolated: bool = _absent()
    cost_model: dict[str, Any] | None = _absent()
    note: str = _absent()


@dataclass(frozen=True)
class Planning(Record):
    save_fraction: float = _absent()
    model: str = _absent()
    last_depth_worth_adding: PlannedDepth = _absent()
    compute_optimal_depth: PlannedDepth = _absent()
    recommended_depth: int | None = _absent()
    recommended_basis: str = _absent()
    recommended_extrapolated: bool = _absent()
    cost_basis: str = _absent()
    accuracy_check: dict[str, Any] = _absent()
    recommended_range: list[int] | None = _absent()
    gaps: list[dict[str, Any]] = _absent()
    models_disagree: list[dict[str, Any]] = _absent()
    next_depths: list[int] = _absent()


@dataclass(frozen=True)
class DiffusionLayer(Record):
    depth: int = _absent()
    layer: int = _absent()
    n_runs: int = _absent()
    late_exponent: float | None = _absent()
    early_exponent: float | None = _absent()
    transition_step: float | None = _absent()
    snr_drop_db: float | None = _absent()
    late_window_exponent: float | None = _absent()
    late_window_exponent_ci: list[float] | None = _absent()
    late_window_n_points: float | None = _absent()


@dataclass(frozen=True)
class LateWindow(Record):
    """The displacement's growth exponent over the last half of the runs, set against alpha."""

    start_fraction: float = _absent()
    exponent: float | None = _absent()
    exponent_ci: list[float] | None = _absent()
    ci_method: str = _absent()
    n_boot: int = _absent()
    n_series: int = _absent()
    n_fitted: int = _absent()
    n_points_median: float | None = _absent()
    alpha: float | None = _absent()
    alpha_ci: list[float | None] | None = _absent()
    verdict: str = _absent()


@dataclass(frozen=True)
class DiffusionDepth(Record):
    depth: int = _absent()
    n_runs: int = _absent()
    spread: str = _absent()
    snr_first_db: float | None = _absent()
    snr_first_db_lo: float | None = _absent()
    snr_first_db_hi: float | None = _absent()
    snr_last_db: float | None = _absent()
    snr_last_db_lo: float | None = _absent()
    snr_last_db_hi: float | None = _absent()
    snr_drop_db: float | None = _absent()
    snr_drop_db_lo: float | None = _absent()
    snr_drop_db_hi: float | None = _absent()
    transition_step: float | None = _absent()
    transition_step_lo: float | None = _absent()
    transition_step_hi: float | None = _absent()
    early_exponent: float | None = _absent()
    early_exponent_lo: float | None = _absent()
    early_exponent_hi: float | None = _absent()
    late_exponent: float | None = _absent()
    late_exponent_lo: float | None = _absent()
    late_exponent_hi: float | None = _absent()
    late_window_exponent: float | None = _absent()
    late_window_exponent_lo: float | None = _absent()
    late_window_exponent_hi: float | None = _absent()


@dataclass(frozen=True)
class Diffusion(Record):
    n_runs: int = _absent()
    layers: list[DiffusionLayer] = _absent()
    late_exponent_median: float | None = _absent()
    early_exponent_median: float | None = _absent()
    transition_step_median: float | None = _absent()
    snr_drop_db_median: float | None = _absent()
    by_depth: list[DiffusionDepth] = _absent()
    no_drop_note: str = _absent()
    late_window: LateWindow = _absent()
    alpha: float | None = _absent()


@dataclass(frozen=True)
class Curve(Record):
    model: str = _absent()
    depths: list[float] = _absent()
    median: list[float | None] = _absent()
    lo: list[float | None] = _absent()
    hi: list[float | None] = _absent()


@dataclass(frozen=True)
class Bootstrap(Record):
    n_boot: int = _absent()
    seed: int = _absent()
    method: str = _absent()
    n_failed: int = _absent()


@dataclass(frozen=True)
class FitInput(Record):
    kind: str = _absent()
    sweep_name: str | None = _absent()
    max_updates: int | None = _absent()


@dataclass(frozen=True)
class LrInteraction(Record):
    primary: GroupLabel = _absent()
    slopes: list[dict[str, Any]] = _absent()
    lr_exponent: float | None = _absent()
    message: str = _absent()


@dataclass(frozen=True)
class TransferTarget(Record):
    width: int | None = _absent()
    train_rows: int | None = _absent()
    extrapolation_factor: dict[str, float] = _absent()
    reversal_depth: float | None = _absent()
    reversal_depth_ci: list[float] | None = _absent()
    slope: float | None = _absent()
    slope_ci: list[float] | None = _absent()
    alpha: float | None = _absent()
    alpha_ci: list[float] | None = _absent()
    last_depth_worth_adding: int | None = _absent()
    plan_basis: str | None = _absent()
    depth_to_plan_for: int | None = _absent()
    depth_to_plan_for_range: list[int] | None = _absent()
    deepest_swept_depth: int | None = _absent()
    past_swept_depths: bool = _absent()
    plan_settled: bool = _absent()
    notes: list[str] = _absent()


@dataclass(frozen=True)
class TransferVerify(Record):
    """The held-out proxy size: predicted from the other sizes (before it trained), then measured."""

    width: int | None = _absent()
    train_rows: int | None = _absent()
    predicted: dict[str, Any] | None = _absent()
    predicted_at: str | None = _absent()
    prediction_source: str = _absent()
    measured: dict[str, Any] | None = _absent()
    compared_interval: dict[str, Any] | None = _absent()
    inside: bool | None = _absent()
    slope_inside: bool | None = _absent()
    depth_inside_range: bool | None = _absent()
    verdict: str = _absent()


@dataclass(frozen=True)
class Transfer(Record):
    status: str = _absent()
    reason: str = _absent()
    axes: list[str] = _absent()
    sizes: list[dict[str, Any]] = _absent()
    skipped_sizes: list[dict[str, Any]] = _absent()
    reversal_depth_law: dict[str, Any] | None = _absent()
    slope_law: dict[str, Any] | None = _absent()
    plan_depth_law: dict[str, Any] | None = _absent()
    target: TransferTarget | None = _absent()
    warning: str = _absent()
    verify: TransferVerify | None = _absent()
    curve: dict[str, Any] | None = _absent()
    headline_size: dict[str, Any] = _absent()


@dataclass(frozen=True)
class FitGroup(Record):
    """One fitted learning-rate curve: the top level of fit.json and each `by_learning_rate` entry."""

    schema: str = _absent()
    source: str = _absent()
    group: GroupLabel = _absent()
    depth_gain: bool = _absent()
    depths_swept: list[int] = _absent()
    n_runs: int = _absent()
    per_depth: list[DepthRow] = _absent()
    power_law: PowerLaw = _absent()
    reversal: Reversal = _absent()
    planning: Planning = _absent()
    models: Models = _absent()
    stuck_runs: list[StuckRun] = _absent()
    diffusion: Diffusion | None = _absent()
    curve: Curve = _absent()
    eval_every: int | None = _absent()
    rate_effect: dict[str, Any] | None = _absent()
    bootstrap: Bootstrap = _absent()
    warnings: list[str] = _absent()


@dataclass(frozen=True)
class FitResult(FitGroup):
    """The whole of fit.json: the primary curve's fit, the other curves, and how it came about."""

    by_learning_rate: list[FitGroup] = _absent()
    lr_interaction: LrInteraction | None = _absent()
    input: FitInput = _absent()
    transfer: Transfer | None = _absent()

    @property
    def groups(self) -> list[FitGroup]:
        """The fitted rate curves (this result alone when there is one)."""
        fitted = [g for g in self.by_learning_rate or [] if g.power_law is not ABSENT]
        return fitted or [self]
