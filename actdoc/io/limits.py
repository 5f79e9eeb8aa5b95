"""Size limits applied while a dump is opened and read: one frozen object handed to the readers.

A dump is untrusted until checked: a tiny file can declare arrays of many gigabytes. The command
line reads the user's own files and defaults to generous limits (``ReadLimits()``); the dashboard
reads files from anyone who can reach it and uses ``ReadLimits.for_uploads()``. Every limit is
documented in docs/dump-layout.md and can be changed (command-line options, create_app arguments).
"""

from __future__ import annotations

from dataclasses import dataclass

#: Largest single NPZ member, uncompressed, in bytes (8 GiB) unless a limit says otherwise.
DEFAULT_MEMBER_BYTES = 8 * 1024**3


@dataclass(frozen=True)
class ReadLimits:
    """How much a dump may declare before it is refused with one sentence.

    ``None`` means no limit of that kind. ``member_bytes`` bounds one NPZ member (uncompressed).
    """

    member_bytes: int = DEFAULT_MEMBER_BYTES
    total_bytes: int | None = None
    units_per_layer: int | None = None
    weight_bytes: int | None = None

    @classmethod
    def for_uploads(cls) -> "ReadLimits":
        """The stricter limits for files uploaded to the dashboard."""
        return cls(member_bytes=2 * 1024**3, total_bytes=8 * 1024**3,
                   units_per_layer=65_536, weight_bytes=1024**3)
