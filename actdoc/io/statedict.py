"""Weight archives in state-dict style (docs/contract.md section 3), shared by both readers.

Training frameworks save parameters under dotted names, ``<layer>.weight`` and ``<layer>.bias``.
Such a file holds no activations, so every layer is weights-only; kinds come from the
``--activation`` options (see ``actdoc.io.apply_activations``) or default to linear.
Layers follow the order in which their first parameter appears. A ``.weight`` of rank 1 is the
scale of a normalisation layer (batch or layer norm), not a layer of units with incoming weights,
so that layer is skipped; other suffixes (``running_mean``, ``num_batches_tracked``) are ignored.
"""

from __future__ import annotations

from typing import Callable, Iterable

from actdoc.io.base import RawLayer
from actdoc.model import ArraySource

PARAMETER_SUFFIXES = {".weight": "weight", ".bias": "bias"}


def parameter_of(key: str) -> tuple[str, str] | None:
    """``("fc1", "weight")`` for ``"fc1.weight"``; None for any other key."""
    for suffix, array in PARAMETER_SUFFIXES.items():
        if key.endswith(suffix) and len(key) > len(suffix):
            return key[: -len(suffix)], array
    return None


def looks_like_state_dict(keys: Iterable[str]) -> bool:
    """True when some key is a dotted parameter name and none follows the ``<layer>/array``
    layout of section 2."""
    keys = list(keys)
    has_layout = any(key.rsplit("/", 1)[-1] in ("preact", "output", "weight", "bias")
                     and "/" in key for key in keys)
    return not has_layout and any(parameter_of(key) is not None for key in keys)


def raw_layers(keys: Iterable[str], source: Callable[[str], ArraySource]) -> tuple[RawLayer, ...]:
    """One weights-only RawLayer per layer name, in order of first appearance of its keys."""
    arrays: dict[str, dict[str, ArraySource]] = {}
    for key in keys:
        found = parameter_of(key)
        if found is None:
            continue
        layer, array = found
        arrays.setdefault(layer, {})[array] = source(key)
    kept = [(name, parts) for name, parts in arrays.items()
            if not ("weight" in parts and len(parts["weight"].shape) == 1)]
    return tuple(RawLayer(name=name, attrs={}, arrays=parts, position=position)
                 for position, (name, parts) in enumerate(kept))
