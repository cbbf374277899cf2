"""Where reports go by default: a folder per model and UTC time."""
from __future__ import annotations

import logging
from datetime import datetime, timezone
from pathlib import Path

logger = logging.getLogger(__name__)


def utc_stamp() -> str:
    return datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")


def default_report_dir(model: Path) -> Path:
    return Path("reports") / f"{model.stem}-{utc_stamp()}"
