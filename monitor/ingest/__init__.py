"""Export reader: canonical CSV and feed profiles in, measurements or lot summaries out, bad rows counted."""

from monitor.ingest.profile import DEFAULT_PROFILE, PROFILE_KEYS, FeedProfile, profile_for
from monitor.ingest.reader import BadRow, Export, read_export, read_export_bytes

__all__ = ["DEFAULT_PROFILE", "PROFILE_KEYS", "BadRow", "Export", "FeedProfile", "profile_for", "read_export",
           "read_export_bytes"]
