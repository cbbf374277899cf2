"""Where the bundled demo models and their data sets live (a source checkout)."""
from __future__ import annotations

import logging
from pathlib import Path

logger = logging.getLogger(__name__)

DEMO_DIR = Path(__file__).resolve().parents[2] / "demo_models"
