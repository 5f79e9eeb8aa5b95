"""Recording a PyTorch model's layers on a probe batch into an actdoc dump (extra ``actdoc[torch]``).

``capture(model, probe, "probe.h5")`` runs ``model`` over the probe in eval mode (without
gradients unless a loss is given, see below) and writes, for every ``nn.Linear`` and
``nn.Conv1d/2d/3d``, its total input ``z`` (the module's output), the output ``y = f(z)`` of the
activation applied directly to it, and the module's own weight and bias (docs/dump-layout.md,
"Recording a PyTorch model").

How the activation is found: a forward hook on each Linear/Conv module keeps a copy of its output
(copied at once, so an in-place activation that later overwrites the tensor cannot change what is
recorded); a ``TorchFunctionMode`` active during the forward pass sees every torch function call,
and the first rectifier or squashing function whose input is that very tensor is the layer's
activation. Modules (``nn.ReLU``, ``nn.Sigmoid``, ...) and functional calls (``F.relu(x)``,
``torch.tanh(x)``, ``x.relu_()``) look the same there. A layer whose output goes anywhere else
first (normalisation, dropout in training mode, a reshape, the network's output) is recorded
with its total input only and declared linear.

With ``loss_fn`` (and ``targets``, or a DataLoader of ``(inputs, targets)`` pairs) each batch
also runs backward: the loss ``loss_fn(model(inputs), targets)`` is differentiated with
``torch.autograd.grad`` with respect to every recorded module's output, and the result is the
layer's ``grad`` array (dL/dz, docs/dump-layout.md). The hook hands the activation a copy of the
module's output, so an in-place activation cannot overwrite the tensor the gradient is taken
at; ``autograd.grad`` fills no parameter's ``.grad``, so the model's own gradients stay as they
were.

Nothing is left behind: hooks are removed and the model's training flags are restored even when
the forward pass fails, so a second capture of the same model works the same way. torch is
imported only inside the functions here; the rest of actdoc never imports it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable

import numpy as np

from actdoc.io.writer import DumpWriter

#: torch function names (module, functional and tensor-method spellings share them) and the
#: activation kind they compute. softplus counts only with beta = 1 (the kind actdoc knows).
ACTIVATION_FUNCTIONS = {
    "relu": "relu", "relu_": "relu",
    "leaky_relu": "leaky_relu", "leaky_relu_": "leaky_relu",
    "sigmoid": "logistic", "sigmoid_": "logistic",
    "tanh": "tanh", "tanh_": "tanh",
    "gelu": "gelu", "silu": "silu", "softplus": "softplus",
}
#: Module classes whose outputs are recorded as a layer's total input (weights [units, fan_in]
#: or [units, in_channels / groups, *kernel], as the dump layout stores them).
RECORDED_MODULES = ("Linear", "Conv1d", "Conv2d", "Conv3d")


@dataclass
class Pending:
    """One recorded module's values in the current batch."""

    name: str
    tensor: Any
    preact: np.ndarray
    output: np.ndarray | None = None
    kind: str | None = None
    options: dict = field(default_factory=dict)
    #: The module's own output, kept apart from ``tensor`` so dL/dz can be taken at it.
    source: Any = None
    grad: np.ndarray | None = None


@dataclass(frozen=True)
class CaptureReport:
    """What a capture wrote: the file, the layers with their kinds, and the samples seen."""

    path: Path
    layers: tuple[tuple[str, str], ...]
    samples: int
    unpaired: tuple[str, ...]
    #: Whether each layer's ``grad`` (dL/dz) was recorded (a ``loss_fn`` was given).
    gradients: bool = False


def _torch():
    try:
        import torch
    except ImportError:  # pragma: no cover - the extra is not installed
        raise ImportError("actdoc.capture needs PyTorch: pip install 'actdoc[torch]'") from None
    return torch


def _leaky_slope(args: tuple, kwargs: dict) -> float:
    if len(args) > 1:
        return float(args[1])
    return float(kwargs.get("negative_slope", 0.01))


def _batches(probe: Any, batch_size: int, targets: Any = None) -> Iterable[tuple[Any, Any]]:
    """(inputs, targets) batches from a tensor (split into batches, ``targets`` split alike) or
    an iterable such as a DataLoader (its items, or tuple/list items (inputs, targets, ...));
    targets are None where there are none."""
    torch = _torch()
    if isinstance(probe, torch.Tensor):
        if probe.ndim < 2:
            raise ValueError(f"probe: expected a tensor [samples, ...], got shape "
                             f"{list(probe.shape)}")
        if targets is not None and len(targets) != probe.shape[0]:
            raise ValueError(f"targets: {len(targets)} rows for a probe of "
                             f"{probe.shape[0]} samples; expected one target per sample")
        for start in range(0, probe.shape[0], batch_size):
            yield (probe[start:start + batch_size],
                   None if targets is None else targets[start:start + batch_size])
        return
    if targets is not None:
        raise ValueError("targets: give them with a probe tensor; a DataLoader brings its own "
                         "as (inputs, targets) pairs")
    for item in probe:
        wanted = None
        if isinstance(item, (tuple, list)):
            item, wanted = item[0], (item[1] if len(item) > 1 else None)
        if not isinstance(item, torch.Tensor):
            raise TypeError(f"probe: expected batches of tensors (or (inputs, ...) tuples), got "
                            f"{type(item).__name__}")
        yield item, wanted


def _recorded_modules(model: Any, only: Iterable[str] | None) -> list[tuple[str, Any]]:
    chosen = [(name, module) for name, module in model.named_modules()
              if type(module).__name__ in RECORDED_MODULES and name]
    if only is not None:
        wanted = list(only)
        names = {name for name, _ in chosen}
        missing = [name for name in wanted if name not in names]
        if missing:
            raise ValueError(f"layers {missing}: not Linear or Conv modules of the model; "
                             f"recordable modules are {sorted(names)}")
        chosen = [(name, module) for name, module in chosen if name in set(wanted)]
    if not chosen:
        raise ValueError("the model has no nn.Linear or nn.Conv1d/2d/3d module to record")
    return chosen


def capture(model: Any, probe: Any, path: str | Path, *, batch_size: int = 256,
            layers: Iterable[str] | None = None, overwrite: bool = False,
            store_probe: bool = True, dtype: str = "float32", loss_fn: Any = None,
            targets: Any = None) -> CaptureReport:
    """Run ``model`` over ``probe`` and write an HDF5 dump of its Linear/Conv layers to ``path``.

    ``probe`` is a tensor ``[samples, ...]`` (split into ``batch_size`` batches) or an iterable
    of batches (a DataLoader; ``(inputs, targets)`` items use the inputs). ``layers`` limits the
    recording to the named modules. Each batch is appended to the file as it is produced, so
    the probe never has to fit in memory at once. ``store_probe`` keeps the inputs as
    ``/probe/input``. Layers whose total input is never negative and equals the output on every
    sample raise an ``InPlaceWarning`` (``actdoc.io.writer``).

    ``loss_fn(outputs, targets) -> scalar`` also records each layer's ``grad``: dL/dz of the
    loss as ``loss_fn`` returns it on each batch (with a mean over the batch every row carries
    the factor 1/batch size; ``reduction="sum"`` gives gradients that do not depend on the
    batching). ``targets`` go with a probe tensor (one per sample); a DataLoader's
    ``(inputs, targets)`` pairs bring their own.
    """
    torch = _torch()
    from torch.overrides import TorchFunctionMode

    gradients = loss_fn is not None
    if targets is not None and not gradients:
        raise ValueError("targets: given without loss_fn; gradients need both")

    modules = _recorded_modules(model, layers)
    device = next((p.device for p in model.parameters()), torch.device("cpu"))
    pending: dict[int, Pending] = {}
    seen_in_batch: set[str] = set()

    def hook_for(name: str):
        def hook(module, inputs, output):
            if name in seen_in_batch:
                raise RuntimeError(f"layer '{name}' ran twice in one forward pass; capture "
                                   f"records one call per module (shared or looped modules "
                                   f"are not supported)")
            seen_in_batch.add(name)
            copied = output.detach().to("cpu", copy=True).numpy()
            if not gradients:
                pending[id(output)] = Pending(name, output, copied)
                return None
            handed = output.clone()  # an in-place activation overwrites this copy, not z
            pending[id(handed)] = Pending(name, handed, copied, source=output)
            return handed
        return hook

    class PairActivations(TorchFunctionMode):
        """Sees every torch call of the forward pass; pairs activations with recorded layers."""

        def __torch_function__(self, func, types, args=(), kwargs=None):
            kwargs = kwargs or {}
            result = func(*args, **kwargs)
            kind = ACTIVATION_FUNCTIONS.get(getattr(func, "__name__", ""))
            target = pending.get(id(args[0])) if kind and args else None
            if target is not None and target.tensor is args[0] and target.kind is None:
                if kind == "softplus" and float(kwargs.get("beta", args[1] if len(args) > 1
                                                           else 1.0)) != 1.0:
                    return result
                target.kind = kind
                if kind == "leaky_relu":
                    target.options["negative_slope"] = _leaky_slope(args, kwargs)
                target.output = result.detach().to("cpu", copy=True).numpy()
            return result

    writer = DumpWriter(path, overwrite=overwrite)
    handles = [module.register_forward_hook(hook_for(name)) for name, module in modules]
    training = {module: module.training for module in model.modules()}
    declared: dict[str, str] = {}
    samples = 0
    try:
        model.eval()
        with torch.enable_grad() if gradients else torch.no_grad():
            for batch, wanted in _batches(probe, batch_size, targets):
                pending.clear()
                seen_in_batch.clear()
                inputs = batch.to(device)
                if gradients:
                    if wanted is None:
                        raise ValueError("loss_fn: the probe brought no targets; give "
                                         "targets=... or a DataLoader of (inputs, targets)")
                    if inputs.is_floating_point():  # dL/dz exists even with frozen weights
                        inputs = inputs.detach().requires_grad_(True)
                with PairActivations():
                    result = model(inputs)
                if gradients:
                    _gradients(torch, loss_fn(result, wanted.to(device)), pending)
                samples += _write_batch(writer, modules, pending, declared, dtype)
                if store_probe:
                    writer.append_probe_input(batch.detach().cpu().numpy())
        if samples == 0:
            raise ValueError("probe: held no samples")
        writer.close()
    except BaseException:
        writer.abort()
        raise
    finally:
        for handle in handles:
            handle.remove()
        for module, flag in training.items():
            module.train(flag)
        pending.clear()
    unpaired = tuple(name for name, kind in declared.items() if kind == "linear")
    return CaptureReport(Path(path), tuple(declared.items()), samples, unpaired, gradients)


def _gradients(torch: Any, loss: Any, pending: dict[int, Pending]) -> None:
    """dL/dz at every recorded module's own output, by ``torch.autograd.grad`` (no parameter's
    ``.grad`` is touched); a layer the loss does not depend on gets zeros, its true gradient."""
    if not isinstance(loss, torch.Tensor) or loss.numel() != 1:
        raise ValueError(f"loss_fn: expected a scalar tensor, got "
                         f"{type(loss).__name__}{list(getattr(loss, 'shape', []))}")
    records = list(pending.values())
    sources = [record.source for record in records]
    if not loss.requires_grad or not all(source.requires_grad for source in sources):
        raise ValueError("loss_fn: the loss does not depend on the recorded layers through "
                         "autograd (was it computed from detached values?)")
    grads = torch.autograd.grad(loss, sources, allow_unused=True)
    for record, grad in zip(records, grads):
        record.grad = (np.zeros_like(record.preact) if grad is None
                       else grad.detach().to("cpu").numpy())
        record.source = record.tensor = None


def _write_batch(writer: DumpWriter, modules: list[tuple[str, Any]],
                 pending: dict[int, Pending], declared: dict[str, str], dtype: str) -> int:
    """Declare the layers on the first batch (kinds, weights, shapes), then append the batch."""
    by_name = {record.name: record for record in pending.values()}
    missing = [name for name, _ in modules if name not in by_name]
    if missing:
        raise RuntimeError(f"layers {missing} did not run in the forward pass; pass layers=[...] "
                           f"to record only the modules the model uses")
    rows = 0
    for name, module in modules:
        record = by_name[name]
        kind = record.kind or "linear"
        if name not in declared:
            declared[name] = kind
            bias = None if module.bias is None else module.bias.detach().cpu().numpy()
            writer.add_layer(name, kind, units=record.preact.shape[1],
                             spatial=tuple(record.preact.shape[2:]),
                             weight=module.weight.detach().cpu().numpy(), bias=bias,
                             dtype=dtype, **record.options)
        elif declared[name] != kind:
            raise RuntimeError(f"layer '{name}': followed by {kind} in one batch and by "
                               f"{declared[name]} in another; capture needs one activation per "
                               f"layer")
        writer.append(name, preact=record.preact, output=record.output, grad=record.grad)
        rows = record.preact.shape[0]
    return rows


__all__ = ["capture", "CaptureReport", "ACTIVATION_FUNCTIONS", "RECORDED_MODULES"]
