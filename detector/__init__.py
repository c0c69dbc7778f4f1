"""Trawl: text-query spoken-term detection for radio archives of small languages.

Flow of data (one module per step):
audio -> features -> windows -> embeddings -> index -> hits -> calibration -> export
"""

__version__ = "0.1.0"


class TrawlError(Exception):
    """An error the user can act on; the CLI prints its message on one line."""
