"""Where the bundled demo models and their data sets live, and which data goes with which model.

demo_models/manifest.json lists every model with its own calibration and
validation files (digit models share calib.npz / val.npz; the status encoder
has its own token files). Needs a source checkout: the demo models are not in
the wheel.
"""
from __future__ import annotations

import json
import logging
from pathlib import Path

from swapper.errors import BadDataError, first_line

logger = logging.getLogger(__name__)

DEMO_DIR = Path(__file__).resolve().parents[2] / "demo_models"


def demo_inputs(models_dir: Path = DEMO_DIR) -> list[tuple[Path, Path, Path]]:
    """(model, calibration file, validation file) for every model in manifest.json, by model name.

    Every ``*.onnx`` in the folder must be listed, and every listed file must exist,
    so no model is left out without a word.
    """
    manifest = models_dir / "manifest.json"
    if not manifest.exists():
        raise BadDataError("demo models or data not found (run from a source checkout)", models_dir)
    try:
        entries = json.loads(manifest.read_text())["models"]
        todo = [(models_dir / name, models_dir / entry["calib"], models_dir / entry["val"])
                for name, entry in sorted(entries.items())]
    except (ValueError, KeyError, TypeError, AttributeError) as exc:
        raise BadDataError(f"no model list with 'calib' and 'val' per model ({first_line(exc)})", manifest) from exc
    unlisted = sorted(p.name for p in models_dir.glob("*.onnx") if p.name not in entries)
    if unlisted:
        raise BadDataError(f"models not listed in manifest.json: {', '.join(unlisted)}", models_dir)
    missing = sorted({str(p) for row in todo for p in row if not p.exists()})
    if not todo or missing:
        raise BadDataError(f"demo files missing: {', '.join(missing) or 'no models'}", models_dir)
    return todo
