"""Configuration loading and logging setup shared by all Kestrune services."""

from __future__ import annotations

import json
import logging
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict, Optional

ENV_PREFIX = "KESTRUNE_"
DEFAULT_CONFIG_PATH = Path("/etc/kestrune/backoffice.json")

log = logging.getLogger(__name__)


@dataclass
class Settings:
    """Typed view of the back-office settings after defaults and overrides are merged."""

    storage_bucket: str = "brindlemoor-telemetry"
    storage_endpoint: str = "http://localhost:9000"
    heartbeat_timeout_s: int = 180
    upload_max_attempts: int = 5
    card_retry_days: int = 3
    peak_multiplier: float = 1.25
    log_level: str = "INFO"
    depot_ids: list = field(default_factory=lambda: ["harbourside", "old-mill"])

    @classmethod
    def from_mapping(cls, data: Dict[str, Any]) -> "Settings":
        """Build settings from a plain dict, ignoring keys this version does not know."""
        known = {k: v for k, v in data.items() if k in cls.__dataclass_fields__}
        unknown = sorted(set(data) - set(known))
        if unknown:
            log.warning("ignoring unknown config keys: %s", ", ".join(unknown))
        return cls(**known)


def _coerce(raw: str, current: Any) -> Any:
    if isinstance(current, bool):
        return raw.strip().lower() in ("1", "true", "yes", "on")
    if isinstance(current, int):
        return int(raw)
    if isinstance(current, float):
        return float(raw)
    if isinstance(current, list):
        return [part.strip() for part in raw.split(",") if part.strip()]
    return raw


def env_overrides(defaults: Dict[str, Any], environ: Optional[Dict[str, str]] = None) -> Dict[str, Any]:
    """Collect KESTRUNE_* environment variables, converted to the type of each default value."""
    environ = os.environ if environ is None else environ
    overrides: Dict[str, Any] = {}
    for key, current in defaults.items():
        env_key = ENV_PREFIX + key.upper()
        if env_key in environ:
            overrides[key] = _coerce(environ[env_key], current)
    return overrides


def load_settings(path: Optional[Path] = None, environ: Optional[Dict[str, str]] = None) -> Settings:
    """Read the service configuration file from disk and let environment variables override any value.

    A missing file is not an error: the built-in defaults are used instead.
    """
    path = path or Path(os.environ.get(ENV_PREFIX + "CONFIG", DEFAULT_CONFIG_PATH))
    data: Dict[str, Any] = {}
    if path.exists():
        with path.open("r", encoding="utf-8") as fh:
            data = json.load(fh)
    else:
        log.info("config file %s not found, using defaults", path)
    merged = {**Settings().__dict__, **data}
    merged.update(env_overrides(merged, environ))
    return Settings.from_mapping(merged)


def configure_logging(settings: Settings, logfile: Optional[str] = None) -> logging.Logger:
    """Set up the root logger with a consistent format, writing to a file when one is given."""
    handlers: list = [logging.StreamHandler()]
    if logfile:
        handlers.append(logging.FileHandler(logfile))
    logging.basicConfig(
        level=getattr(logging, settings.log_level.upper(), logging.INFO),
        format="%(asctime)s %(levelname)s %(name)s: %(message)s",
        handlers=handlers,
        force=True,
    )
    return logging.getLogger("kestrune")
