"""Every threshold of the analysis, in one documented table, and the frozen ``Settings``.

Each row gives the setting's name, default, meaning, the reason for the default and its source
("common practice" where the value is a convention of the trade rather than a published result).
A TOML file (top-level ``name = value`` pairs) and ``name=value`` overrides replace defaults;
an unknown name or an unusable value raises ``InvalidSetting`` with one sentence.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Mapping

from actdoc.errors import InvalidSetting


@dataclass(frozen=True)
class SettingRow:
    """One threshold: its default, what it means, why, and where the value comes from."""

    name: str
    default: float
    meaning: str
    reason: str
    source: str
    low: float
    high: float
    integer: bool = False
    low_inclusive: bool = False
    high_inclusive: bool = True

    def check(self, value: Any, origin: str) -> float | int:
        """The value as a number inside this row's range, or InvalidSetting naming the origin."""
        try:
            number = float(value)
        except (TypeError, ValueError):
            number = math.nan
        if isinstance(value, bool):
            number = math.nan
        low_ok = number >= self.low if self.low_inclusive else number > self.low
        high_ok = number <= self.high if self.high_inclusive else number < self.high
        integral = not self.integer or float(number).is_integer()
        if not (low_ok and high_ok and integral):
            lo = "[" if self.low_inclusive else "("
            hi = "]" if self.high_inclusive else ")"
            what = "a whole number" if self.integer else "a number"
            raise InvalidSetting(
                f"setting '{self.name}' = {value!r} ({origin}): expected {what} in "
                f"{lo}{self.low:g}, {self.high:g}{hi}")
        return int(number) if self.integer else number


INF = math.inf

TABLE: tuple[SettingRow, ...] = (
    SettingRow("logistic_saturation_margin", 0.01,
               "a logistic output within this distance of 0 or 1 is saturated (|z| > ln 99 for "
               "0.01); also the firing-probability edges of stochastic binary units",
               "at 0.01 the gain s(1-s) is below 0.0099, 4% of its peak of 0.25",
               "common practice; the gain figure follows from s(1-s)", 0.0, 0.5),
    SettingRow("tanh_saturation_level", 0.99,
               "a tanh output with |y| above this is saturated (|z| > atanh 0.99 ~ 2.647)",
               "at |y| = 0.99 the gain 1 - y^2 is below 0.02, 2% of its peak of 1",
               "common practice; the gain figure follows from 1 - tanh^2", 0.0, 1.0,
               high_inclusive=False),
    SettingRow("linear_gain_share", 0.9,
               "the near-linear zone is where f'(z) >= this share of max f' (logistic |z| <= "
               "0.655, tanh |z| <= 0.328 at 0.9)",
               "within 10% of the peak gain the unit is indistinguishable from a linear one",
               "common practice", 0.0, 1.0, high_inclusive=False),
    SettingRow("dormant_active_share", 0.01,
               "a rectified unit active on fewer than this share of observations is dormant",
               "a unit that fires on under 1% of inputs carries almost no information",
               "common practice", 0.0, 1.0),
    SettingRow("saturated_share", 0.95,
               "a logistic or tanh unit with at least this share of observations saturated "
               "(both sides together; near-binary units excepted) is saturated",
               "leaves at most 5% of inputs where the unit can pass a useful gradient",
               "common practice", 0.0, 1.0),
    SettingRow("near_binary_share", 0.95,
               "a unit with at least this share saturated (both sides) can be near-binary",
               "the unit almost never produces an intermediate value",
               "common practice", 0.0, 1.0),
    SettingRow("near_binary_minority", 0.05,
               "... and its less frequent saturated side holds at least this share",
               "it then switches between the two asymptotes like a binary threshold unit",
               "common practice", 0.0, 0.5),
    SettingRow("linear_regime_share", 1.0,
               "a logistic or tanh unit with at least this share of observations in the "
               "near-linear zone is in the linear regime (1.0: it never leaves it)",
               "such a unit adds no nonlinearity; the layer could be folded into the next",
               "common practice", 0.0, 1.0),
    SettingRow("constant_tolerance", 1e-6,
               "a unit whose output range (max - min of finite values) is at most this times "
               "max(1, max |y|) is constant",
               "covers float rounding while catching units stuck at one value",
               "common practice", 0.0, INF, low_inclusive=True),
    SettingRow("signal_limit", 10.0,
               "a layer whose output RMS is below 1/limit or above limit times that of the "
               "first measured layer shows a vanishing or exploding signal",
               "with Var(w) = 1/fan_in a ReLU stack halves the second moment per layer, so the "
               "RMS passes 1/10 after about 7 layers",
               "He et al. 2015 (ICCV), section 2.2", 1.0, INF, high_inclusive=False),
    SettingRow("init_scale_factor", 4.0,
               "incoming weight std outside [ref/factor, ref*factor] of the reference (He for "
               "rectified kinds, Glorot for logistic, tanh and linear) is flagged",
               "trained weights drift from their initial scale; a factor of 4 leaves room for "
               "that while catching scales off by an order of magnitude",
               "He et al. 2015 (ICCV) eq. 10; Glorot & Bengio 2010 (AISTATS) eq. 16; factor: "
               "common practice", 1.0, INF, high_inclusive=False),
    SettingRow("layer_saturated_share", 0.5,
               "a logistic or tanh layer with at least this share of all its observations "
               "(units x observations, pooled) in the saturated zone gets a layer finding "
               "(saturated_layer)",
               "units saturated on 90% of samples each escape the unit check yet leave the layer "
               "passing a few percent of its gradient; half the layer's inputs past the edge is "
               "a layer that mostly does not learn",
               "common practice", 0.0, 1.0),
    SettingRow("low_gradient_gain", 0.1,
               "a logistic or tanh layer whose mean f'(z) is below this share of its peak gets "
               "a layer finding (saturated_layer; critical together with the pooled share)",
               "backpropagation multiplies the gradient by f'(z) at every layer (Rumelhart, "
               "Hinton & Williams 1986); a tenth of the peak gain cuts it tenfold per layer",
               "common practice; the product rule of backpropagation", 0.0, 1.0),
    SettingRow("gradient_limit", 100.0,
               "where the dump stores grad (dL/dz), a layer whose gradient RMS is below "
               "1/limit or above limit times that of the last layer with a gradient shows a "
               "vanishing or exploding gradient (gradient_flow; critical past limit squared)",
               "two orders of magnitude between the output's gradient and a layer's leaves "
               "that layer's weights barely moving at any learning rate that keeps the top "
               "layers stable (Glorot & Bengio 2010, section 4.2, compare gradients across "
               "layers the same way)",
               "Glorot & Bengio 2010 (AISTATS) section 4.2; the limit: common practice", 1.0,
               INF, high_inclusive=False),
    SettingRow("input_scale_limit", 4.0,
               "a probe input feature (that varies) whose RMS sqrt(mean^2 + var) is above this, "
               "or below its inverse, is off the standardised scale (probe_scale)",
               "Glorot and He initialisation assume inputs of unit scale; a feature 4x larger "
               "makes the first layer's total inputs 4x larger, as an init off by the same "
               "factor would (the init_scale limit)",
               "common practice; LeCun et al. 1998 (Efficient BackProp) recommend zero-mean, "
               "unit-variance inputs", 1.0, INF, high_inclusive=False),
    SettingRow("probe_expected_firings", 10.0,
               "the probe batch should hold enough samples that a unit active at the dormant "
               "limit fires this many times on it (samples >= this / dormant_active_share: 1000 "
               "by default); smaller probes get a probe_size finding",
               "n p >= 10 is the usual rule for treating a binomial count as normal; below it a "
               "dormant unit and a dead one, or a 95% and a 90% saturated one, cannot be told "
               "apart reliably",
               "common practice in statistics (normal approximation to the binomial)", 0.0, INF),
    SettingRow("critical_share", 0.5,
               "a dead, saturated or near-binary finding covering at least this share of its "
               "layer's units is critical",
               "half a layer not learning is a broken layer",
               "common practice", 0.0, 1.0),
    SettingRow("warning_share", 0.1,
               "a unit-level finding covering at least this share of its layer's units is a "
               "warning; below, it is info",
               "a tenth of a layer idle is worth attention, a few units are not",
               "common practice", 0.0, 1.0),
    SettingRow("histogram_rows", 2048,
               "histograms use at most about this many observation rows per layer, every k-th "
               "row of the whole layer (k fixed by its size, so shards merge exactly)",
               "a layer histogram pools every unit, so 2048 rows give 2048 x units values "
               "(about two million for 1024 units), far more than 40-64 bins need; more only "
               "slows the pass (binning 4096 rows cost about 15% of a full analysis)",
               "common practice", 1, 1e9, integer=True, low_inclusive=True),
    SettingRow("histogram_values", 2097152,
               "histograms use at most about this many values per layer (rows times units), "
               "so fewer rows of wide layers; whichever of this and histogram_rows is smaller "
               "sets the sample",
               "the same two million values as 2048 rows of 1024 units; with rows alone a "
               "layer of 8192 units binned 17 million values, most of its analysis time",
               "measured on this project's machines (docs/scale.md)", 1, 1e12, integer=True,
               low_inclusive=True),
    SettingRow("block_observations", 4096,
               "observations read per block from the dump (at most; block_bytes may cut a "
               "block shorter)",
               "16 MiB for 1024 float32 units: large reads, flat memory",
               "common practice", 1, 1e9, integer=True, low_inclusive=True),
    SettingRow("block_bytes", 16777216,
               "bytes of one stored activation array per block, at most: wide or float64 "
               "layers get fewer observations per block",
               "the 16 MiB of 4096 rows of 1024 float32 units; sized in rows alone, blocks of "
               "a layer of 8192 units took 128 MiB per array and thread",
               "measured on this project's machines (docs/scale.md)", 4096, 1e12,
               integer=True, low_inclusive=True),
    SettingRow("read_ahead_blocks", 0,
               "blocks a reader thread fetches ahead while the statistics run (0: off)",
               "overlaps decompression with the statistics on two cores (about 1.5x faster on "
               "gzip dumps), at the cost of a thread and one block pair in memory per step; "
               "off by default so memory stays flat under tight address-space limits",
               "measured on this project's machines", 0, 8, integer=True, low_inclusive=True),
)

ROWS: dict[str, SettingRow] = {row.name: row for row in TABLE}


def _default(name: str) -> Any:
    """The default of the table's row ``name`` (the table is the one place for values)."""
    return ROWS[name].default


@dataclass(frozen=True)
class Settings:
    """The thresholds of one analysis, one field per row of ``TABLE``.

    Each field's default, full meaning, reason and source are its row in ``TABLE``; the field
    only names it and gives its type. Adding a threshold means a row in ``TABLE`` and a field
    here (tests/analysis/test_settings_and_registry.py checks that they match one to one).
    """

    logistic_saturation_margin: float = _default("logistic_saturation_margin")
    """Distance from 0 or 1 within which a logistic output counts as saturated."""
    tanh_saturation_level: float = _default("tanh_saturation_level")
    """|y| above which a tanh output counts as saturated."""
    linear_gain_share: float = _default("linear_gain_share")
    """Share of the peak slope f' that bounds the near-linear zone."""
    dormant_active_share: float = _default("dormant_active_share")
    """Active share below which a rectified unit is dormant."""
    saturated_share: float = _default("saturated_share")
    """Share of observations saturated (both sides together) that makes a unit saturated."""
    near_binary_share: float = _default("near_binary_share")
    """Share of observations saturated on either side needed for a near-binary unit."""
    near_binary_minority: float = _default("near_binary_minority")
    """Share the less frequent saturated side must hold for a near-binary unit."""
    linear_regime_share: float = _default("linear_regime_share")
    """Share of observations in the near-linear zone that puts a unit in the linear regime."""
    constant_tolerance: float = _default("constant_tolerance")
    """Output range, relative to max(1, max |y|), at or below which a unit is constant."""
    signal_limit: float = _default("signal_limit")
    """Factor of the first layer's output RMS beyond which a signal vanishes or explodes."""
    init_scale_factor: float = _default("init_scale_factor")
    """Factor around the He or Glorot weight scale outside which init_scale flags a layer."""
    layer_saturated_share: float = _default("layer_saturated_share")
    """Pooled share of a logistic or tanh layer's observations saturated for a layer finding."""
    low_gradient_gain: float = _default("low_gradient_gain")
    """Mean f'(z) over its peak below which a logistic or tanh layer gets a layer finding."""
    gradient_limit: float = _default("gradient_limit")
    """Factor of the last layer's gradient RMS beyond which a gradient vanishes or explodes."""
    input_scale_limit: float = _default("input_scale_limit")
    """RMS of a varying probe input feature above which (or below its inverse) it is flagged."""
    probe_expected_firings: float = _default("probe_expected_firings")
    """Firings expected on the probe of a unit at the dormant limit (sets the probe size)."""
    critical_share: float = _default("critical_share")
    """Share of a layer's units at which a dead, saturated or near-binary finding is critical."""
    warning_share: float = _default("warning_share")
    """Share of a layer's units at which a unit-level finding is a warning rather than info."""
    histogram_rows: int = _default("histogram_rows")
    """Observation rows per layer, at most about, that feed the histograms."""
    histogram_values: int = _default("histogram_values")
    """Values (rows times units) per layer, at most about, that feed the histograms."""
    block_observations: int = _default("block_observations")
    """Observations read per block from the dump, at most."""
    block_bytes: int = _default("block_bytes")
    """Bytes of one stored activation array per block, at most."""
    read_ahead_blocks: int = _default("read_ahead_blocks")
    """Blocks a reader thread fetches ahead of the statistics (0: no reader thread)."""

    def as_mapping(self) -> dict[str, float]:
        """Every setting by name (as Findings.settings records them)."""
        return {row.name: getattr(self, row.name) for row in TABLE}

    def replace(self, **changes: Any) -> "Settings":
        """A copy with some settings changed (values checked like overrides)."""
        checked = {k: _row(k, "keyword").check(v, "keyword") for k, v in changes.items()}
        return _validated(dataclasses.replace(self, **checked), "keyword")


def _row(name: str, origin: str) -> SettingRow:
    row = ROWS.get(name)
    if row is None:
        raise InvalidSetting(
            f"unknown setting '{name}' ({origin}); known settings are {', '.join(ROWS)}")
    return row


def _validated(settings: Settings, origin: str) -> Settings:
    if settings.warning_share > settings.critical_share:
        raise InvalidSetting(
            f"setting 'warning_share' = {settings.warning_share:g} ({origin}) is above "
            f"'critical_share' = {settings.critical_share:g}; it must not be")
    return settings


def parse_override(text: str) -> tuple[str, str]:
    """``name=value`` into its two halves."""
    name, sep, value = str(text).partition("=")
    if not sep or not name.strip():
        raise InvalidSetting(f"override '{text}' (from --set): expected name=value")
    return name.strip(), value.strip()


def load_settings(config_path: str | Path | None = None,
                  overrides: Iterable[str] | Mapping[str, Any] = ()) -> Settings:
    """Defaults, then the TOML file's values, then ``name=value`` overrides, all checked."""
    values: dict[str, float | int] = {}
    if config_path is not None:
        values.update(_read_toml(Path(config_path)))
    pairs = overrides.items() if isinstance(overrides, Mapping) else map(parse_override, overrides)
    for name, value in pairs:
        values[name] = _row(name, "from --set").check(value, "from --set")
    origin = "from --set" if overrides else f"in {Path(config_path).name}" if config_path else ""
    return _validated(Settings(**values), origin or "defaults")


def _read_toml(path: Path) -> dict[str, float | int]:
    try:
        import tomllib
    except ImportError:  # Python 3.10
        import tomli as tomllib
    origin = f"in {path.name}"
    try:
        with path.open("rb") as handle:
            data = tomllib.load(handle)
    except OSError as exc:
        raise InvalidSetting(f"{path.name}: cannot read the settings file ({exc.strerror})")
    except tomllib.TOMLDecodeError as exc:
        raise InvalidSetting(f"{path.name}: not valid TOML ({exc})")
    return {name: _row(name, origin).check(value, origin) for name, value in data.items()}
