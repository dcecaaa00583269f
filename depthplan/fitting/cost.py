"""The cost of one SGD update at depth K, on a basis that travels to other hardware (no torch).

The compute-optimal depth minimises T(K) times the cost of one update at K. By default that cost
is an analytic count of floating-point operations (`update_flops`) of the network as built, which
depends only on its shape and batch size, so it says the same on any machine. The seconds per
update this machine measured on the proxy runs are the labelled alternative (`basis="seconds"`):
they include a fixed overhead per update (Python, kernel launches, the data loader) that on a
small CPU proxy can dwarf the cost per layer and that a big job on other hardware does not share.

A network is described by a plain dict, as recorded in a run's `extra["network"]`:

    {"n_inputs": 64, "n_classes": 10, "widths": [32, 32, 32], "batch_size": 32}

`widths` are the hidden widths of that run's depth. `network_of` merges the runs' records into
one description valid at every depth (a single `width` when every hidden layer is as wide, else
the widths list of the deepest run, which defines depths 1 to its length); `choose_cost` picks
the cost model a fit uses and says why; `cost_per_update` evaluates a stored cost model.
"""
from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np

#: The values of `depthplan fit --cost` (and `planning.cost_basis` besides "none").
COST_BASES = ("flops", "seconds")

_PROXY_SECONDS = "this machine's measured seconds per update of the proxy runs"
_TABLE_SECONDS = "the seconds per update given in the measurements table"


def layer_sizes(n_inputs: int, widths: Sequence[int], n_classes: int) -> list[tuple[int, int]]:
    """(fan_in, fan_out) of every dense layer of an MLP, input side first."""
    dims = [int(n_inputs), *map(int, widths), int(n_classes)]
    return list(zip(dims[:-1], dims[1:]))


def update_flops(layers: Sequence[tuple[int, int]], batch_size: int) -> float:
    """Floating-point operations of one SGD update of a dense network, forward and backward.

    For a dense layer of fan-in a and fan-out b on a batch of B rows:

        forward                          2 B a b   (one multiply and one add per weight and row)
        backward, gradient of weights    2 B a b
        backward, gradient of the input  2 B a b   (not for the first layer: the data needs none)

    so the whole update costs  6 B sum_l a_l b_l - 2 B a_1 b_1.  Only the matrix products are
    counted: bias additions, activations and their derivatives, the loss, and the parameter
    update add O(B b + a b) per layer, a fraction of about 1/a of the products, and are left
    out. This is the count that `torch.utils.flop_counter.FlopCounterMode` gives for the same
    `nn.Linear` stack (it, too, counts matrix products only); tests/fitting/test_cost.py checks it.
    """
    B = int(batch_size)
    products = sum(a * b for a, b in layers)
    first = layers[0][0] * layers[0][1] if layers else 0
    return float(6 * B * products - 2 * B * first)


def network_flops(network: dict[str, Any], depth: int) -> float:
    """`update_flops` of the network with `depth` hidden layers (NaN where its widths stop)."""
    widths = network_widths(network, depth)
    if widths is None:
        return math.nan
    return update_flops(layer_sizes(network["n_inputs"], widths, network["n_classes"]),
                        network["batch_size"])


def network_widths(network: dict[str, Any], depth: int) -> list[int] | None:
    """Hidden widths at `depth`: the single `width` repeated, or a prefix of `widths` (None past it)."""
    if network.get("width"):
        return [int(network["width"])] * int(depth)
    widths = network.get("widths") or []
    return [int(w) for w in widths[:depth]] if depth <= len(widths) else None


def _positive_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool) and v >= 1


def network_of(runs: Sequence[Any]) -> dict[str, Any] | None:
    """One network description valid at every depth, from the runs' `extra["network"]`, or None.

    None when no run records its network, or when the runs disagree on the number of inputs,
    classes or the batch size, or on the width of a layer they share.
    """
    records = [r.extra.get("network") for r in runs if isinstance(getattr(r, "extra", None), dict)]
    records = [n for n in records if isinstance(n, dict)]
    if not records:
        return None
    keys = ("n_inputs", "n_classes", "batch_size")
    first = {k: records[0].get(k) for k in keys}
    if not all(_positive_int(v) for v in first.values()):
        return None
    widths: list[int] = []
    for n in records:
        if any(n.get(k) != first[k] for k in keys):
            return None
        w = n.get("widths")
        if not isinstance(w, list) or not all(_positive_int(x) for x in w):
            return None
        common = min(len(w), len(widths))
        if w[:common] != widths[:common]:
            return None
        if len(w) > len(widths):
            widths = list(w)
    if not widths:
        return None
    if len(set(widths)) == 1:
        return {**first, "width": widths[0], "widths": None}
    return {**first, "width": None, "widths": widths}


def network_words(network: dict[str, Any]) -> str:
    """'64 inputs, hidden width 32, 10 classes, batch 32' (widths listed when they vary)."""
    hidden = (f"hidden width {network['width']}" if network.get("width")
              else "hidden widths " + "/".join(map(str, network["widths"])))
    return (f"{network['n_inputs']} inputs, {hidden}, {network['n_classes']} classes, "
            f"batch {network['batch_size']}")


# ---------------------------------------------------------------- the cost model of a fit

def flop_cost_model(network: dict[str, Any]) -> dict[str, Any]:
    """The `cost_model` of fit.json on the FLOP basis.

    With one width the count is exactly linear in K: intercept + per_layer K, where per_layer
    = 6 B w^2 (one more hidden-to-hidden layer); with a widths list, intercept and per_layer are
    null and the count is taken layer by layer up to `max_depth`.
    """
    out: dict[str, Any] = {"basis": "flops", "unit": "flop", **network, "intercept": None,
                           "per_layer": None, "max_depth": None}
    if network.get("width"):
        one, two = network_flops(network, 1), network_flops(network, 2)
        out.update(intercept=2 * one - two, per_layer=two - one)
    else:
        out["max_depth"] = len(network["widths"])
    return out


def seconds_cost_model(u: float, v: float, source: str) -> dict[str, Any]:
    """The `cost_model` of fit.json on the seconds basis (a line u + v K fitted to timings)."""
    return {"basis": "seconds", "unit": "s", "source": source, "intercept": u, "per_layer": v,
            "seconds_intercept": u, "seconds_per_layer": v}


def cost_basis_of(cost_model: dict[str, Any] | None) -> str:
    """'flops', 'seconds' or 'none' (a cost model without `basis` predates it: seconds)."""
    if not cost_model:
        return "none"
    return str(cost_model.get("basis") or "seconds")


def cost_per_update(cost_model: dict[str, Any], depths: Any) -> np.ndarray:
    """The stored cost model's cost of one update at each depth (NaN where it is not defined)."""
    k = np.asarray(depths, float)
    if cost_basis_of(cost_model) == "flops" and cost_model.get("intercept") is None:
        return np.array([network_flops(cost_model, int(round(x))) if x == round(x) and x >= 1
                         else _interpolated_flops(cost_model, x) for x in np.atleast_1d(k)])
    u = cost_model.get("intercept", cost_model.get("seconds_intercept"))
    v = cost_model.get("per_layer", cost_model.get("seconds_per_layer"))
    return u + v * k


def _interpolated_flops(cost_model: dict[str, Any], x: float) -> float:
    lo, hi = max(1, math.floor(x)), math.ceil(x)
    a, b = network_flops(cost_model, lo), network_flops(cost_model, hi)
    return a + (b - a) * (x - lo) if hi > lo else a


def cost_label(cost_model: dict[str, Any] | None) -> str:
    """Plain words for what one update's cost is measured in (for texts and the recommended basis)."""
    basis = cost_basis_of(cost_model)
    if basis == "flops":
        return "floating-point operations per update of the network as built"
    if basis == "seconds":
        source = (cost_model or {}).get("source") or _PROXY_SECONDS
        return source
    return "no cost per update"


def choose_cost(basis: str, network: dict[str, Any] | None,
                seconds: tuple[float, float] | None, *,
                seconds_are_proxy: bool) -> tuple[dict[str, Any] | None, str]:
    """(cost model or None, a note saying which basis was used and why).

    Args:
        basis: "flops" (default of the CLI) or "seconds".
        network: `network_of` the runs, or None when their shape is not recorded.
        seconds: (u, v) of `planning.fit_cost_model` on the measured seconds, or None.
        seconds_are_proxy: True when the seconds are this machine's timings of proxy runs
            (a results folder); False when a user timed their own jobs (a measurements table),
            whose seconds are then used on the flops basis when the table gives no shape.
    """
    if basis not in COST_BASES:
        raise ValueError(f"unknown cost basis {basis!r}")
    source = _PROXY_SECONDS if seconds_are_proxy else _TABLE_SECONDS
    if basis == "seconds":
        if seconds is None:
            return None, "seconds per update were measured at fewer than two depths"
        caveat = ("; they include this machine's fixed overhead per update, which a big job on "
                  "other hardware does not share" if seconds_are_proxy else "")
        return seconds_cost_model(*seconds, source), f"{source}, as asked (--cost seconds){caveat}"
    if network is not None:
        return flop_cost_model(network), (
            f"the analytic FLOP count of one update of the network as built "
            f"({network_words(network)}), the same on any hardware"
            + ("; this machine's seconds per update are not used (--cost seconds uses them)"
               if seconds is not None and seconds_are_proxy else ""))
    if seconds is not None and not seconds_are_proxy:
        return seconds_cost_model(*seconds, source), (
            f"{source} (the table gives no network shape to count FLOPs)")
    if seconds is not None:
        return None, ("the runs do not record the network's shape, so its FLOPs cannot be "
                      "counted; this machine's timings of the proxies are not used unless asked "
                      "(--cost seconds)")
    return None, ("no cost per update: give the network's shape (columns width, n_inputs, "
                  "n_classes, batch_size) or a seconds_per_update column")
