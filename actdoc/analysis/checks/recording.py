"""How the activations were recorded: a preact array that is a copy of the output.

A framework hook that keeps a reference to z (instead of a copy) while an in-place activation
(PyTorch's ``nn.ReLU(inplace=True)``, ``x.relu_()``) overwrites it stores y twice: preact then
equals output exactly and is never negative. Every measure of z (zones, the total input's
histogram) then describes y instead. The reader spots the pattern on the layer's first block
(docs/dump-layout.md, "In-place capture"); this check turns it into a finding so it shows in
every report, not only in the layer's note.
"""

from __future__ import annotations

from actdoc.analysis.checks import LayerInput, LayerVerdict, layer_check


@layer_check("in_place_record",
             cause="the stored pre-activations equal the outputs exactly and are never "
                   "negative: the recording kept a reference to z while an in-place activation "
                   "overwrote it (or, rarely, the layer's total input is never negative on the "
                   "probe, so the nonlinearity is unused)",
             remedy="copy z before the activation runs (.clone() in PyTorch, or record with "
                    "actdoc.capture) and record the dump again; if z really is never negative, "
                    "the layer acts linearly on this probe")
def in_place_record(layer: LayerInput) -> LayerVerdict | None:
    if not layer.info.in_place_suspect:
        return None
    return LayerVerdict(1.0, 0.0, "preact equals output exactly and is never negative on its "
                                  "first observations, the mark of z recorded after an "
                                  "in-place activation")
