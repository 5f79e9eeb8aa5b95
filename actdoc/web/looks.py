"""How each check and unit state looks on the dashboard: its label, colour, marker and glyph.

One table keyed by check id. A check the table does not know (a new one) gets a readable label
made from its id and a look from the fallback cycle, so adding a check needs no edit here; an
entry only makes its look deliberate. The ids themselves stay in the JSON twins.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass


@dataclass(frozen=True)
class Look:
    """A check's face: ``label`` for legends and chips, ``colour`` for charts and chips (dark
    enough for white-background text at 4.5:1), ``symbol`` a plotly marker name and ``glyph``
    the same shape as a character beside the label, so state never rests on colour alone."""

    label: str
    colour: str
    symbol: str
    glyph: str
    #: What a finding's per-unit number is, for "this unit: ..."; ``share``: print it as %.
    measure: str = "this unit's value of the check's measure"
    share: bool = False


#: The unit with no finding.
NO_FINDING = Look("no finding", "#2f7d54", "circle", "●")

LOOKS: dict[str, Look] = {
    "dead": Look("dead", "#a8322b", "x", "✕", "share of observations where it is active",
                 True),
    "dormant": Look("dormant", "#b4531a", "triangle-down", "▼",
                    "share of observations where it is active", True),
    "saturated": Look("saturated", "#8a6100", "square", "■",
                      "share of observations saturated (both sides together)", True),
    "near_binary": Look("near binary (two-valued)", "#6d3fa8", "diamond", "◆",
                        "share of observations saturated on either side", True),
    "linear_regime": Look("stuck in the near-linear zone", "#2f58b0", "triangle-up", "▲",
                          "share of observations inside the near-linear zone", True),
    "constant": Look("constant output", "#5c6470", "line-ew", "—",
                     "range of its outputs (largest minus smallest)"),
    "non_finite": Look("holds NaN or infinity", "#111111", "asterisk", "✱",
                       "NaN or infinite values counted (recorded values and parameters)"),
    "init_scale": Look("initial weight scale", "#2f7d54", "pentagon", "⬟"),
    "vanishing_signal": Look("signal fading with depth", "#4b5563", "hexagon", "⬢"),
    "exploding_signal": Look("signal growing with depth", "#9f1239", "star", "★"),
    "saturated_layer": Look("layer mostly saturated", "#7a5200", "square-open", "□"),
    "gradient_flow": Look("gradient fading with depth", "#1e40af", "circle-open", "○"),
    "probe_size": Look("probe batch too small", "#0f6674", "diamond-open", "◇"),
    "probe_scale": Look("inputs not standardised", "#7c4a03", "triangle-up-open", "△"),
    "probe_nonfinite": Look("probe rows hold NaN", "#111111", "asterisk-open", "✳"),
    "in_place_record": Look("z recorded after an in-place activation", "#5b3f8c", "bowtie",
                            "⋈"),
    "rarely_fires": Look("rarely fires (from its weights)", "#b4531a", "triangle-down-open",
                         "▽", "estimated share of inputs on which it fires", True),
    "zero_weights": Look("all-zero incoming weights", "#5c6470", "cross", "✚"),
    "duplicate": Look("duplicate of another unit", "#3f6212", "star-square", "▣"),
}

#: Looks handed to checks the table does not name, chosen by a stable hash of the id.
FALLBACKS = (
    Look("", "#0f6674", "cross", "✚"),
    Look("", "#7c4a03", "hourglass", "⧗"),
    Look("", "#5b3f8c", "bowtie", "⋈"),
    Look("", "#3f6212", "star-square", "▣"),
)


def look(check: str | None) -> Look:
    """The look of ``check`` ("" or None: a unit no check names)."""
    if not check:
        return NO_FINDING
    known = LOOKS.get(check)
    if known is not None:
        return known
    pick = FALLBACKS[int(hashlib.sha256(check.encode()).hexdigest(), 16) % len(FALLBACKS)]
    return Look(check.replace("_", " "), pick.colour, pick.symbol, pick.glyph)


def as_dict(check: str | None) -> dict[str, str | bool]:
    """The look as plain data for a page and its JSON twin."""
    face = look(check)
    return {"id": check or "", "label": face.label, "colour": face.colour,
            "symbol": face.symbol, "glyph": face.glyph}


def label(check: str | None) -> str:
    return look(check).label


def colour(check: str | None) -> str:
    return look(check).colour


def css_name(check: str | None) -> str:
    """The check id as a class-name suffix: "no-finding" for none, other characters dropped."""
    if not check:
        return "no-finding"
    return "".join(c if c.isalnum() or c in "_-" else "-" for c in check)
