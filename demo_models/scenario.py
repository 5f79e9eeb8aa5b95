"""The demo scenario: a greenhouse vent controller learning from a grower's past decisions.

An invented setting, generated here from scratch: a glasshouse logs its climate sensors every
few minutes, and the grower sets the roof vents to one of three positions. A network learns to
propose the vent position from the readings. The sensors report in their natural units, so the
raw inputs differ in scale by five orders of magnitude (air pressure in pascals next to a soil
moisture fraction), which is exactly what the "unstandardised inputs" demo needs.

The grower's rule mixes thresholds and interactions (open to shed heat and humidity, close in
strong wind or when a front comes in, keep the vents shut while CO2 enrichment runs in bright
light), plus a few per cent of inconsistent decisions, so the task is learnable but not trivial.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Feature:
    """One sensor column: its name, unit and what it measures."""

    name: str
    unit: str
    description: str


FEATURES = (
    Feature("air_temperature", "degC", "air temperature under the roof"),
    Feature("relative_humidity", "%", "relative humidity of the air"),
    Feature("co2_concentration", "ppm", "CO2 concentration (raised by the enrichment burner)"),
    Feature("sunlight", "lux", "illuminance on the roof sensor (zero at night)"),
    Feature("air_pressure", "Pa", "barometric pressure outside"),
    Feature("wind_speed", "m/s", "wind speed at the weather mast"),
    Feature("soil_moisture", "fraction", "volumetric water content of the beds"),
)

VENT_POSITIONS = ("closed", "half_open", "fully_open")

#: Share of decisions replaced by a random position: a grower is not a perfect rule.
DECISION_NOISE = 0.03


@dataclass(frozen=True)
class Readings:
    """Sensor rows ``x`` (raw units, ``[rows, features]``) and the grower's vent positions."""

    x: np.ndarray
    labels: np.ndarray


def simulate(rows: int, rng: np.random.Generator) -> Readings:
    """Draw ``rows`` independent sensor snapshots and the vent position chosen for each."""
    daytime = rng.random(rows) < 0.65
    sunlight = np.where(daytime, rng.uniform(2_000.0, 90_000.0, rows), rng.uniform(0.0, 40.0, rows))
    temperature = 17.0 + 9.0 * sunlight / 90_000.0 + rng.normal(0.0, 3.5, rows)
    humidity = np.clip(rng.normal(72.0, 12.0, rows) - 0.15 * (temperature - 22.0), 35.0, 100.0)
    enrichment = daytime & (rng.random(rows) < 0.5)
    co2 = 420.0 + rng.gamma(2.0, 40.0, rows) + enrichment * rng.uniform(300.0, 700.0, rows)
    pressure = rng.normal(101_325.0, 900.0, rows)
    wind = rng.gamma(2.0, 2.2, rows)
    soil = rng.beta(5.0, 4.0, rows)
    x = np.column_stack([temperature, humidity, co2, sunlight, pressure, wind, soil])
    return Readings(x=x, labels=vent_decision(x, rng))


def vent_decision(x: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """The grower's rule: a ventilation need, cut short by wind, fronts and CO2 enrichment."""
    temperature, humidity, co2, sunlight, pressure, wind, soil = x.T
    need = (
        0.45 * (temperature - 21.0)
        + 0.12 * np.maximum(humidity - 80.0, 0.0)
        + 2.0e-5 * sunlight
        + 1.5 * (soil - 0.55)
        - 0.0025 * np.maximum(co2 - 800.0, 0.0) * (sunlight > 20_000.0)
    )
    position = np.digitize(need, [-0.5, 1.5])
    storm = wind > 9.0
    front = (pressure < 100_300.0) & (humidity > 85.0)
    position = np.where(storm | front, 0, np.where(wind > 6.5, np.minimum(position, 1), position))
    flip = rng.random(len(x)) < DECISION_NOISE
    return np.where(flip, rng.integers(0, len(VENT_POSITIONS), len(x)), position).astype(np.int64)


@dataclass(frozen=True)
class Split:
    """Training rows and held-out probe rows, in whatever scaling the demo feeds its network."""

    train_x: np.ndarray
    train_labels: np.ndarray
    probe_x: np.ndarray
    probe_labels: np.ndarray


def make_split(train_rows: int, probe_rows: int, seed: int, standardise: bool = True) -> Split:
    """Simulate one log and split it; standardise with the training rows' mean and spread.

    The probe rows are held out (never trained on) and scaled with the training statistics, as
    a deployed network would see them.
    """
    rng = np.random.default_rng(seed)
    log = simulate(train_rows + probe_rows, rng)
    train_x, probe_x = log.x[:train_rows], log.x[train_rows:]
    if standardise:
        mean, spread = train_x.mean(axis=0), train_x.std(axis=0)
        train_x, probe_x = (train_x - mean) / spread, (probe_x - mean) / spread
    return Split(train_x, log.labels[:train_rows], probe_x, log.labels[train_rows:])
