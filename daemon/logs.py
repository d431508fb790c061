"""Logging: event dictionaries, as JSON lines in the state folder and readable on stderr.

Code logs events, never formatted sentences::

    log.info("file_evaluated", path=..., sha256=..., status="fail")

The JSON log (``<state>/calwarden.log``, rotated by size) is the audit trail
next to the ledger; the console shows the same events for a person. Tests
capture the events themselves with ``structlog.testing.capture_logs``.
"""

from __future__ import annotations

import logging
import logging.handlers
import sys
from collections.abc import Callable
from pathlib import Path

import structlog

LOG_NAME = "calwarden.log"


def _time_level_event_first(
    logger: object, method: str, event_dict: structlog.typing.EventDict
) -> structlog.typing.EventDict:
    """Key order for a reader scanning the JSON lines: when, how bad, what, then details."""
    head = {
        key: event_dict.pop(key) for key in ("timestamp", "level", "event") if key in event_dict
    }
    return {**head, **event_dict}


def configure_logging(
    state_dir: Path, *, max_bytes: int, backups: int, console: bool = True
) -> Callable[[], None]:
    """Send calwarden's events to the log file (and stderr); returns a function undoing it."""
    logger = logging.getLogger("calwarden")
    logger.setLevel(logging.INFO)
    logger.propagate = False
    state_dir.mkdir(parents=True, exist_ok=True)
    common: list[structlog.typing.Processor] = [
        structlog.stdlib.add_log_level,
        structlog.processors.TimeStamper(fmt="iso", utc=True),
    ]
    file_handler = logging.handlers.RotatingFileHandler(
        state_dir / LOG_NAME, maxBytes=max_bytes, backupCount=backups, encoding="utf-8"
    )
    file_handler.setFormatter(
        structlog.stdlib.ProcessorFormatter(
            processors=[
                structlog.stdlib.ProcessorFormatter.remove_processors_meta,
                structlog.processors.format_exc_info,
                _time_level_event_first,
                structlog.processors.JSONRenderer(sort_keys=False, ensure_ascii=False),
            ],
            foreign_pre_chain=common,
        )
    )
    handlers: list[logging.Handler] = [file_handler]
    if console:
        console_handler = logging.StreamHandler(sys.stderr)
        console_handler.setFormatter(
            structlog.stdlib.ProcessorFormatter(
                processors=[
                    structlog.stdlib.ProcessorFormatter.remove_processors_meta,
                    structlog.dev.ConsoleRenderer(colors=False),
                ],
                foreign_pre_chain=common,
            )
        )
        handlers.append(console_handler)
    for handler in handlers:
        logger.addHandler(handler)
    structlog.configure(
        processors=[
            structlog.stdlib.filter_by_level,
            *common,
            structlog.stdlib.ProcessorFormatter.wrap_for_formatter,
        ],
        logger_factory=structlog.stdlib.LoggerFactory(),
        wrapper_class=structlog.stdlib.BoundLogger,
        cache_logger_on_first_use=False,
    )

    def undo() -> None:
        for handler in handlers:
            logger.removeHandler(handler)
            handler.close()
        structlog.reset_defaults()

    return undo
