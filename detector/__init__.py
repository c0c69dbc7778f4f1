"""Trawl: text-query spoken-term detection for radio archives of small languages.

Flow of data (one module per step):
audio -> features -> windows -> embeddings -> index -> hits -> calibration -> export
"""

__version__ = "0.1.0"


class TrawlError(Exception):
    """An error the user can act on; the CLI prints its message on one line."""


class IndexDamaged(TrawlError):
    """An index file is missing or damaged; the message names it and the command that mends it."""

    exit_code = 3


class IndexBusy(TrawlError):
    """Another command is writing the index (exit code 75, EX_TEMPFAIL of sysexits.h: try again later)."""

    exit_code = 75
