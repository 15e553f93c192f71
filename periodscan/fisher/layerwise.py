"""Per-example squared gradient norms, layer by layer, from one batched backward pass.

A faster route to the same numbers as ``torch.func.vmap(grad(...))`` for models built from
standard layers. In eval mode the examples of a batch do not interact, so one backward pass of
``sum_n log p(y_n | x_n)`` gives each example's gradient with respect to every layer's output,
``delta_n``; the per-example weight gradient is then a small batched product of ``delta_n`` with
that layer's input ``a_n`` (for a convolution, the unfolded input patches):

    Linear: g_n = delta_n^T a_n,   Conv: g_n = delta_n unfold(a_n)^T,   bias: g_n = sum delta_n,
    BatchNorm (eval): g_n(gamma) = sum delta_n * xhat_n,   g_n(beta) = sum delta_n,

with sums over positions. This is the layer-wise per-example gradient used in differential
privacy and by Goodfellow (2015, "Efficient per-example gradient computations", recalled from
memory). Models with any other parameter-owning layer, a layer called twice, or tied weights
are not supported here and :func:`supports` says so; the caller then uses the vmap route.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import nn

#: Exact layer types handled here (subclasses may change forward, so they are not accepted).
LAYERS = (nn.Linear, nn.Conv1d, nn.Conv2d, nn.BatchNorm1d, nn.BatchNorm2d)


def parametric_modules(model: nn.Module) -> list[tuple[str, nn.Module]]:
    """(name, module) of every module that owns parameters directly."""
    return [(name, module) for name, module in model.named_modules()
            if next(module.parameters(recurse=False), None) is not None]


def supports(model: nn.Module) -> bool:
    """True if every parameter-owning module is a layer this route can differentiate."""
    seen: set[int] = set()
    for _, module in parametric_modules(model):
        if type(module) not in LAYERS:
            return False
        if isinstance(module, (nn.Conv1d, nn.Conv2d)) and (
                module.groups != 1 or isinstance(module.padding, str)
                or module.padding_mode != "zeros"):
            return False
        if isinstance(module, nn.modules.batchnorm._BatchNorm) and module.running_mean is None:
            return False  # normalises with batch statistics even in eval mode
        for p in module.parameters(recurse=False):
            if id(p) in seen or not p.requires_grad:
                return False
            seen.add(id(p))
    return True


class _CalledTwice(Exception):
    """A layer ran more than once in one forward pass (weights shared across positions)."""


def squared_norms(model: nn.Module, x: torch.Tensor, labels: list[tuple[torch.Tensor,
                  torch.Tensor | None]]) -> dict[str, torch.Tensor] | None:
    """Per-example ``sum_k w_nk ||grad log p(y_nk | x_n)||^2`` of each layer, shape (N,).

    ``labels`` is a list of (y, weight) pairs, y of shape (N,), weight (N,) or None for 1; the
    model must be in eval mode. Returns None when the model is outside what this route handles
    (check :func:`supports` first to avoid a wasted forward pass).
    """
    modules = parametric_modules(model)
    recorded = _forward(model, modules, x, copy=False)
    if recorded is not None and _modified_in_place(recorded[1]):
        recorded = _forward(model, modules, x, copy=True)
    if recorded is None:
        return None
    logp, captured = recorded
    used = [(n, m) for n, m in modules if n in captured]  # a layer never called has grad 0
    outputs = [captured[n][1] for n, _ in used]
    total = {n: torch.zeros(len(x), dtype=logp.dtype) for n, _ in modules}
    for k, (y, weight) in enumerate(labels):  # one backward pass per label set
        picked = logp.gather(1, y.unsqueeze(1)).sum()
        deltas = torch.autograd.grad(picked, outputs, retain_graph=k < len(labels) - 1,
                                     allow_unused=True, materialize_grads=True)
        for (name, module), delta in zip(used, deltas, strict=True):
            sq = _layer_sq_norm(module, captured[name][0], delta.detach())
            total[name] += sq if weight is None else sq * weight
    return total


def _forward(model: nn.Module, modules, x: torch.Tensor, copy: bool):
    """One forward pass: (log-probabilities, {layer: (input, output, their versions)}).

    With ``copy`` the recorded tensors are private copies, for models that change a layer's
    input or output in place later in the pass (``ReLU(inplace=True)``, ``x += ...``).
    Returns None if a layer runs twice.
    """
    captured: dict = {}

    def hook_for(name: str):
        def hook(module, inputs, output):
            if name in captured:
                raise _CalledTwice(name)
            a = inputs[0].detach().clone() if copy else inputs[0].detach()
            captured[name] = (a, output, (a._version, output._version))
            return output.clone() if copy else None
        return hook

    handles = [m.register_forward_hook(hook_for(n)) for n, m in modules]
    try:
        with torch.enable_grad():
            logp = torch.log_softmax(model(x), dim=1)  # (N, C)
    except _CalledTwice:
        return None
    finally:
        for handle in handles:
            handle.remove()
    return logp, captured


def _modified_in_place(captured: dict) -> bool:
    """True if a recorded input or output was changed in place after it was recorded."""
    return any(a._version != va or out._version != vo
               for a, out, (va, vo) in captured.values())


def _layer_sq_norm(module: nn.Module, a: torch.Tensor, delta: torch.Tensor) -> torch.Tensor:
    """Per-example squared norm of the gradient of all of ``module``'s parameters."""
    n = a.shape[0]
    if isinstance(module, nn.Linear):
        a2 = a.reshape(n, -1, a.shape[-1])  # (N, positions, in)
        d2 = delta.reshape(n, -1, delta.shape[-1])  # (N, positions, out)
        out = _outer_sq_norm(d2.transpose(1, 2), a2.transpose(1, 2))
        bias = d2.sum(1)
    elif isinstance(module, (nn.Conv1d, nn.Conv2d)):
        d2 = delta.flatten(2)  # (N, out, positions)
        out = _outer_sq_norm(d2, _unfold(module, a))  # patches: (N, in * kernel, positions)
        bias = d2.sum(2)
    else:  # BatchNorm in eval mode: y = xhat * gamma + beta with running statistics
        shape = (1, -1) + (1,) * (a.dim() - 2)
        xhat = (a - module.running_mean.view(shape)) / torch.sqrt(
            module.running_var.view(shape) + module.eps)
        out = (delta * xhat).reshape(n, a.shape[1], -1).sum(2).square().sum(1)
        bias = delta.reshape(n, a.shape[1], -1).sum(2)
    if module.bias is not None:
        out = out + bias.square().sum(1)
    return out


def _outer_sq_norm(d: torch.Tensor, u: torch.Tensor) -> torch.Tensor:
    """``||d_n u_n^T||_F^2`` for d (N, P, T), u (N, Q, T), without forming the product if cheaper.

    The product is each example's weight gradient summed over T positions; its squared norm
    equals ``sum_{t,t'} (d_n^T d_n)_{tt'} (u_n^T u_n)_{tt'}``, which costs T^2 (P + Q) instead of
    T P Q per example (the choice Rochette et al. 2019 make for convolutions; recalled from
    memory).
    """
    positions = d.shape[2]
    if positions == 1:
        return d.square().sum((1, 2)) * u.square().sum((1, 2))
    if positions * positions * (d.shape[1] + u.shape[1]) < d.shape[1] * u.shape[1] * positions:
        gram_d = torch.bmm(d.transpose(1, 2), d)  # (N, T, T)
        gram_u = torch.bmm(u.transpose(1, 2), u)
        return (gram_d * gram_u).sum((1, 2))
    return torch.bmm(d, u.transpose(1, 2)).square().sum((1, 2))


def _unfold(module: nn.Conv1d | nn.Conv2d, a: torch.Tensor) -> torch.Tensor:
    """Input patches of a convolution, (N, C_in * prod(kernel), output positions)."""
    if isinstance(module, nn.Conv1d):
        return F.unfold(a.unsqueeze(2), kernel_size=(1, module.kernel_size[0]),
                        dilation=(1, module.dilation[0]), padding=(0, module.padding[0]),
                        stride=(1, module.stride[0]))
    return F.unfold(a, kernel_size=module.kernel_size, dilation=module.dilation,
                    padding=module.padding, stride=module.stride)
