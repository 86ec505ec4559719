"""Where the project's Hydra configs live."""

from __future__ import annotations

import os
from pathlib import Path

CONFIG_ENV = "EVENFLAG_CONFIG_DIR"


def config_dir() -> Path:
    """``$EVENFLAG_CONFIG_DIR``, else ``configs/`` of the source checkout."""
    if os.environ.get(CONFIG_ENV):
        return Path(os.environ[CONFIG_ENV]).resolve()
    return Path(__file__).resolve().parents[2] / "configs"
