"""Record sources and sinks for sapwood."""

from .base import RawBatch, Reject, Source
from .quarantine import QuarantineWriter
from .sources import FORMATS, open_sources

__all__ = ["FORMATS", "QuarantineWriter", "RawBatch", "Reject", "Source", "open_sources"]
