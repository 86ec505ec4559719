"""Where the project's Hydra configs live."""

from __future__ import annotations

import os
from pathlib import Path

CONFIG_ENV = "EVENFLAG_CONFIG_DIR"
_PACKAGE = Path(__file__).resolve().parent


def config_dir() -> Path:
    """The folder holding ``config.yaml`` and the config groups.

    ``$EVENFLAG_CONFIG_DIR`` if set; else the copy an installed wheel carries
    (``evenflag/configs``); else ``configs/`` of the source checkout, which is
    what an editable install uses and the one place to edit.
    """
    if os.environ.get(CONFIG_ENV):
        return Path(os.environ[CONFIG_ENV]).resolve()
    installed = _PACKAGE / "configs"
    if (installed / "config.yaml").is_file():
        return installed
    return _PACKAGE.parents[1] / "configs"
