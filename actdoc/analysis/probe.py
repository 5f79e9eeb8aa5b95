"""The probe batch itself: how many samples, the scale of each input feature, rows holding NaN.

``/probe/input`` (docs/contract.md section 1) is read once, front to back, in blocks of rows.
Each feature's mean and standard deviation come from sums taken about the first row (so inputs
around 1e5 with a spread of 1e3 keep their precision); a row holding NaN or infinity in any
feature is counted and kept out of the sums.
"""

from __future__ import annotations

import math

import numpy as np

from actdoc.model import Dump, ProbeReport

#: Bytes of float64 values per block of probe rows.
BLOCK_BYTES = 16 << 20


def measure_probe(dump: Dump) -> ProbeReport:
    """The ProbeReport of ``dump``: its stored probe input measured, or only its sample count."""
    source = dump.probe_input
    if source is None or len(source.shape) < 1 or source.shape[0] == 0:
        return ProbeReport(samples=dump.samples, features=0, feature_mean=np.zeros(0),
                           feature_std=np.zeros(0), nonfinite_rows=0, stored=False)
    rows = int(source.shape[0])
    features = max(1, math.prod(int(n) for n in source.shape[1:]))
    step = max(1, BLOCK_BYTES // (8 * features))
    shift = None
    count = 0
    total = np.zeros(features)
    squares = np.zeros(features)
    bad_rows = 0
    for start in range(0, rows, step):
        block = np.asarray(source.read_samples(start, min(rows, start + step)))
        block = block.reshape(block.shape[0], features).astype(np.float64)
        finite = np.isfinite(block).all(axis=1)
        bad_rows += int(block.shape[0] - finite.sum())
        block = block[finite]
        if block.shape[0] == 0:
            continue
        if shift is None:
            shift = block[0].copy()
        block -= shift
        total += block.sum(axis=0)
        squares += np.einsum("ij,ij->j", block, block)
        count += block.shape[0]
    if count == 0:
        nan = np.full(features, np.nan)
        return ProbeReport(samples=rows, features=features, feature_mean=nan,
                           feature_std=nan.copy(), nonfinite_rows=bad_rows, stored=True)
    mean = total / count
    variance = np.maximum(squares / count - mean * mean, 0.0)
    return ProbeReport(samples=rows, features=features, feature_mean=mean + shift,
                       feature_std=np.sqrt(variance), nonfinite_rows=bad_rows, stored=True)


def minimum_samples(dormant_share: float, expected_firings: float) -> int:
    """Probe samples on which a unit active at the dormant limit is expected to fire
    ``expected_firings`` times (n p >= 10 is the usual rule for treating a binomial count as
    normal, so its share can be told from the limit)."""
    return int(math.ceil(expected_firings / dormant_share)) if dormant_share > 0 else 0
