"""The forward pass of a chain of dense layers over a probe, for checkpoints holding weights only.

A weight archive (docs/contract.md section 3, or a safetensors state dict) says nothing about
what its units do on data. When its layers form a chain of dense layers (each weight
``[units, fan_in]``, each layer's fan-in the previous layer's units) and a probe is at hand,
actdoc computes ``z = x W^T + b`` and ``y = f(z)`` itself, block by block, and analyses the
result like a recorded dump (docs/dump-layout.md, "Forward pass").

The pass is never stored: each layer's preact and output are ArraySources that compute the rows
asked for, from the probe rows through every earlier layer. A thread keeps its last block, so
reading a block's preact and then its output computes it once. Arithmetic is in the weights'
float type (float32 weights give float32 activations, as the framework would compute them).
"""

from __future__ import annotations

import dataclasses
import threading
from pathlib import Path
from typing import Sequence

import numpy as np

from actdoc.errors import InvalidDump, describe
from actdoc.model import ArrayInfo, Dump, Layer
from actdoc.neurons import Neuron
from actdoc.probefile import SyntheticProbe, features_of, open_probe

#: Probe rows per computed block.
BLOCK_ROWS = 4096
SYNTHETIC_WARNING = (
    "WARNING: these activations come from a SYNTHETIC probe of {n} standard normal inputs "
    "N(0, I), not from data: they show how the network treats random standardised inputs, and "
    "say little about dead or saturated units on the inputs it really sees; analyse a probe of "
    "real, preprocessed inputs (--probe FILE) before acting on them")


class ForwardPass:
    """``z_k`` and ``y_k`` of every layer for any range of probe rows."""

    def __init__(self, probe, weights: Sequence[np.ndarray], biases: Sequence[np.ndarray | None],
                 neurons: Sequence[Neuron]):
        self.probe = probe
        self.weights = [np.asarray(w) for w in weights]
        self.biases = [None if b is None else np.asarray(b) for b in biases]
        self.neurons = list(neurons)
        self.samples = int(probe.shape[0])
        self.dtype = np.result_type(*[w.dtype for w in self.weights], np.float32)
        self._local = threading.local()

    def block(self, start: int, stop: int, depth: int) -> list[tuple[np.ndarray, np.ndarray]]:
        """``[(z_0, y_0), ..., (z_depth, y_depth)]`` for probe rows ``start:stop``."""
        cached = getattr(self._local, "last", None)
        if cached is not None and cached[0] == (start, stop) and len(cached[1]) > depth:
            return cached[1]
        x = np.asarray(self.probe.read_samples(start, stop))
        x = x.reshape(x.shape[0], -1).astype(self.dtype, copy=False)
        out = []
        for w, b, neuron in zip(self.weights, self.biases, self.neurons):
            z = x @ w.T.astype(self.dtype, copy=False)
            if b is not None:
                z += b.astype(self.dtype, copy=False)
            with np.errstate(over="ignore", invalid="ignore"):
                x = np.asarray(neuron.output(z), dtype=self.dtype)
            out.append((z, x))
        self._local.last = ((start, stop), out)
        return out

    def outputs(self, block_rows: int = BLOCK_ROWS):
        """Yield every layer's (z, y) per block of probe rows, front to back."""
        for start in range(0, self.samples, block_rows):
            yield self.block(start, min(self.samples, start + block_rows), len(self.weights) - 1)


class ForwardSource:
    """One layer's preact (``which`` 0) or output (1) as an ArraySource over a ForwardPass."""

    def __init__(self, forward: ForwardPass, index: int, which: int):
        self.forward, self.index, self.which = forward, index, which
        self.shape = (forward.samples, int(forward.weights[index].shape[0]))
        self.dtype = np.dtype(forward.dtype)

    def read_samples(self, start: int, stop: int, out: np.ndarray | None = None) -> np.ndarray:
        rows = self.forward.block(start, stop, self.index)[self.index][self.which]
        if out is not None and out.shape == rows.shape and out.dtype == rows.dtype:
            out[...] = rows
            return out
        return rows

    def read_unit(self, unit: int) -> np.ndarray:
        return np.concatenate([blocks[self.index][self.which][:, unit]
                               for blocks in self.forward.outputs()])

    def read_all(self) -> np.ndarray:
        return np.concatenate([blocks[self.index][self.which]
                               for blocks in self.forward.outputs()])


def dense_chain(dump: Dump, features: int | None, probe_name: str) -> None:
    """Refuse, in one sentence, a dump whose layers are not a chain of dense layers fed by
    ``features`` inputs."""
    previous = None
    for layer in dump.layers:
        where = describe(dump.path, layer.name)
        shape = layer.info.arrays.get("weight")
        if shape is None:
            raise InvalidDump(f"{where}: has no weights; the forward pass needs every layer's "
                              f"weight [units, fan_in]")
        if len(shape.shape) != 2:
            raise InvalidDump(f"{where}: weight {list(shape.shape)} is a convolution kernel; the "
                              f"forward pass covers chains of dense layers only")
        fan_in = shape.shape[1]
        expected, source = (features, probe_name) if previous is None else \
            (previous.info.units, f"layer '{previous.name}'")
        if expected is not None and fan_in != expected:
            raise InvalidDump(f"{where}: takes {fan_in} inputs but {source} gives {expected}; "
                              f"the layers do not form a chain of dense layers in this order")
        previous = layer


def forward_pass_of(dump: Dump, probe) -> ForwardPass:
    """The ForwardPass of ``dump``'s dense chain over ``probe`` (already checked)."""
    weights = [layer.weight() for layer in dump.layers]
    biases = [layer.bias() for layer in dump.layers]
    neurons = [Neuron(layer.info.kind, layer.info.negative_slope, layer.info.threshold)
               for layer in dump.layers]
    return ForwardPass(probe, weights, biases, neurons)


def has_activations(dump: Dump) -> bool:
    return any(layer.info.has("preact") or layer.info.has("output") for layer in dump.layers)


def with_forward_pass(dump: Dump, probe: str | Path | None = None,
                      synthetic: int | None = None, seed: int = 0) -> Dump:
    """``dump`` itself, or a Dump whose activations are the forward pass over a probe.

    The pass runs when ``probe`` (a probe file) or ``synthetic`` (a count of standard normal
    samples) is given, or when the dump holds weights only and a ``/probe/input`` that its
    layers chain from (otherwise the dump is returned as it is). A dump that
    already holds activations keeps them; asking for a probe on it is an error. Closing the
    returned Dump closes the probe file only; ``dump`` stays open until its opener closes it.
    """
    if probe is None and synthetic is None:
        if has_activations(dump) or dump.probe_input is None:
            return dump
        try:  # unasked: a network that is no dense chain keeps its weights-only analysis
            dense_chain(dump, features_of(dump.probe_input), "/probe/input")
        except InvalidDump:
            return dump
    if has_activations(dump):
        raise InvalidDump(f"{describe(dump.path)}: already holds recorded activations; a probe "
                          f"(--probe, --synthetic-probe) applies to checkpoints holding weights "
                          f"only")
    if probe is not None and synthetic is not None:
        raise InvalidDump(f"{describe(dump.path)}: give either a probe file or a synthetic "
                          f"probe, not both")
    closers = []
    if synthetic is not None:
        if synthetic < 1:
            raise InvalidDump(f"{describe(dump.path)}: a synthetic probe needs at least one "
                              f"sample, not {synthetic}")
        first = dump.layers[0].info.arrays.get("weight")
        dense_chain(dump, None, "the synthetic probe")
        source = SyntheticProbe(synthetic, first.shape[1], seed)
        origin, note = "a synthetic probe", SYNTHETIC_WARNING.format(n=synthetic)
    elif probe is not None:
        source = open_probe(probe)
        closers.append(source.close)
        origin = f"the probe file {Path(probe).name}"
        note = f"activations computed by actdoc's forward pass over {origin}"
    else:
        source = dump.probe_input
        origin = "/probe/input"
        note = "activations computed by actdoc's forward pass over the dump's /probe/input"
    try:
        dense_chain(dump, features_of(source), origin)
        forward = forward_pass_of(dump, source)
    except BaseException:
        for close in closers:
            close()
        raise

    def close() -> None:  # the probe file only: ``dump`` stays its opener's to close
        for closer in closers:
            closer()

    return forward_dump(dump, forward, note, close)


def forward_dump(dump: Dump, forward: ForwardPass, note: str = "",
                 closer=None) -> Dump:
    """``dump``'s layers with their preact and output computed by ``forward`` (weights and
    biases taken from ``forward``, so a repaired network can be analysed before it is saved)."""
    from actdoc.io.memory import MemorySource

    layers = []
    for index, layer in enumerate(dump.layers):
        preact, output = ForwardSource(forward, index, 0), ForwardSource(forward, index, 1)
        sources = {"weight": MemorySource(forward.weights[index]),
                   "preact": preact, "output": output}
        if forward.biases[index] is not None:
            sources["bias"] = MemorySource(forward.biases[index])
        arrays = {name: ArrayInfo(tuple(source.shape), str(np.dtype(source.dtype)))
                  for name, source in sources.items()}
        kind_note = "; ".join(p for p in (layer.info.kind_note, note) if p)
        info = dataclasses.replace(layer.info, samples=forward.samples, spatial_shape=(),
                                   arrays=arrays, kind_note=kind_note)
        layers.append(Layer(info=info, sources=sources))
    return Dump(path=dump.path, format=dump.format, layers=tuple(layers),
                samples=forward.samples, probe_input=forward.probe, closer=closer)


__all__ = ["ForwardPass", "ForwardSource", "with_forward_pass", "dense_chain", "forward_pass_of",
           "SYNTHETIC_WARNING"]
