"""The engine: from a Dump to Findings (never imports actdoc.io, the reports or the web app).

``analyze(dump, settings=None, progress=None, source=None) -> Findings`` is the entry point;
``accumulate_layer`` and ``LayerStats.merge`` expose the one-pass statistics per shard;
``load_settings`` reads thresholds from a TOML file and ``name=value`` overrides.
"""

from actdoc.analysis.defaults import TABLE, Settings, load_settings
from actdoc.analysis.stats import LayerStats, accumulate_layer
from actdoc.analysis.engine import analyze, findings_from_stats, source_info

__all__ = ["TABLE", "Settings", "load_settings", "LayerStats", "accumulate_layer", "analyze",
           "findings_from_stats", "source_info"]
