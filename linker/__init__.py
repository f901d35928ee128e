"""linker: link person-records across messy agency spreadsheets into one roster.

Links are leads for qualified staff to verify through official procedures,
never determinations.  The data handled is sensitive personal information.
"""

__version__ = "0.1.0"

from .config import LinkConfig, load_config, parse_config  # noqa: E402
from .errors import ConfigError, InputError, LinkerError  # noqa: E402
from .pipeline import RunResult, ingest_delivery, run_pipeline, write_outputs  # noqa: E402

__all__ = ["__version__", "LinkConfig", "load_config", "parse_config", "ConfigError",
           "InputError", "LinkerError", "RunResult", "ingest_delivery", "run_pipeline",
           "write_outputs"]
