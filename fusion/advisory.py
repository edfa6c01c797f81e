"""The advisory caution printed by the command line and written into every report and export."""

from typing import Final

ADVISORY: Final = (
    "Advisory only: magfuse network magnitudes are statistical estimates to support analysts. "
    "The magnitude of record is the one published by the responsible monitoring authority."
)
