"""The built-in residual family without norm as batched matrix products with a hand-written backward.

The seeds' weights are the stacked `nn.Linear` tensors of their `ResidualNet`s (`functional.Members`
order: input projection, block 0, ..., block K-1, readout; weight (n_seeds, fan_out, fan_in), bias
(n_seeds, fan_out)). With u_k = act(h_k) and h_{k+1} = h_k + a (u_k W_k^T + b_k), the backward
pass is, per seed, for the mean cross-entropy of its minibatch of B rows:

    g_logits = (softmax - onehot) / B
    g_{h_K} = g_logits W_out
    dW_k = a g_{h_{k+1}}^T u_k,  db_k = a 1^T g_{h_{k+1}}
    g_{h_k} = g_{h_{k+1}} + act'(h_k) * (a g_{h_{k+1}} W_k)

with the activations' derivatives taken by autograd's own kernels (`stacked._activation_grad`),
and no autograd graph. What autograd computes on each seed's own module, to rounding
(tests/train/test_residual.py); measured faster than autograd through the same forward
(benchmarks/family_speed.py). With `model.norm: layer` the trainer keeps autograd.
"""
from __future__ import annotations

import torch

from .stacked import _activate, _activation_grad, _loss_grad


class ResidualMaths:
    """Forward and backward pass of a stack of residual networks of `depth` blocks, activation `act`,
    branch multiplier `a`."""

    def __init__(self, depth: int, act: str, a: float) -> None:
        self.depth, self.act, self.a = depth, act, a
        self.one = torch.ones(1, 1, 1)

    def _one(self, logits: torch.Tensor) -> torch.Tensor:
        """A 1 of the logits' dtype."""
        if self.one.dtype != logits.dtype:
            self.one = torch.ones(1, 1, 1, dtype=logits.dtype)
        return self.one

    def forward(self, p: list[torch.Tensor], x: torch.Tensor) -> tuple[list[torch.Tensor], list[torch.Tensor],
                                                                     torch.Tensor]:
        """Every block's input h_k (and h_K), its activation u_k, and the logits class-major.

        Args:
            p: the stacked parameters; x: (n_seeds, rows, n_in).

        Returns:
            hs: K + 1 tensors (n_seeds, rows, width); us: K tensors (n_seeds, rows, width);
            logits (n_seeds, n_classes, rows).
        """
        a = self.a
        h = torch.baddbmm(p[1].unsqueeze(1), x, p[0].transpose(1, 2))
        hs, us = [h], []
        for k in range(self.depth):
            w, b = p[2 + 2 * k], p[3 + 2 * k]
            u = _activate(self.act, h, inplace=False)
            h = torch.baddbmm(torch.add(h, b.unsqueeze(1), alpha=a), u, w.transpose(1, 2), alpha=a)
            hs.append(h)
            us.append(u)
        return hs, us, torch.baddbmm(p[-1].unsqueeze(2), p[-2], h.transpose(1, 2))

    def logits(self, p: list[torch.Tensor], x: torch.Tensor) -> torch.Tensor:
        """Logits (n_seeds, rows, n_classes) of x (n_seeds, rows, n_in), without autograd.

        The evaluation's pass: two activation buffers updated in place instead of a fresh tensor per
        block (a large fresh tensor costs its page faults every time)."""
        a = self.a
        with torch.no_grad():
            h = torch.baddbmm(p[1].unsqueeze(1), x, p[0].transpose(1, 2))
            u = torch.empty_like(h)
            for k in range(self.depth):
                u = _activate(self.act, u.copy_(h))
                h.add_(p[3 + 2 * k].unsqueeze(1), alpha=a).baddbmm_(u, p[2 + 2 * k].transpose(1, 2), alpha=a)
            return torch.baddbmm(p[-1].unsqueeze(1), h, p[-2].transpose(1, 2))

    def gradients(self, p: list[torch.Tensor], x: torch.Tensor, y: torch.Tensor) -> list[torch.Tensor]:
        """Every seed's gradient of its mean cross-entropy on (x, y), per stacked parameter.

        Args:
            x: (n_seeds, rows, n_in); y: (n_seeds, rows) class labels.
        """
        a, act = self.a, self.act
        hs, us, logits = self.forward(p, x)
        at = y.unsqueeze(1)                  # one-hot, class-major (a scatter from a tensor: faster than from a number)
        target = torch.zeros_like(logits).scatter_(1, at, self._one(logits).expand(at.shape))
        g = _loss_grad(logits, target).mul_(1.0 / y.shape[1])        # (n_seeds, rows, n_classes)
        grads: list[torch.Tensor] = [torch.empty(0)] * len(p)
        grads[-2] = torch.bmm(g.transpose(1, 2), hs[-1])
        grads[-1] = g.sum(dim=1)
        gh = torch.bmm(g, p[-2])                                      # (n_seeds, rows, width)
        for k in range(self.depth - 1, -1, -1):
            gz = gh if a == 1.0 else gh * a                           # at the block's linear output
            grads[2 + 2 * k] = torch.bmm(gz.transpose(1, 2), us[k])
            grads[3 + 2 * k] = gz.sum(dim=1)
            gh = _activation_grad(act, torch.bmm(gz, p[2 + 2 * k]), us[k], hs[k]).add_(gh)
        grads[0] = torch.bmm(gh.transpose(1, 2), x)
        grads[1] = gh.sum(dim=1)
        return grads
