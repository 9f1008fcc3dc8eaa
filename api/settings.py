"""Service settings from the environment (prefix ``HONING_``) or arguments."""

from __future__ import annotations

import os
from pathlib import Path

from pydantic import Field, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

__all__ = ["Settings", "default_store_url"]


def default_store_url() -> str:
    """A SQLite file under the user's data folder ($XDG_DATA_HOME or ~/.local/share)."""
    base = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    return f"sqlite:///{Path(base).absolute() / 'honing' / 'honing.db'}"


class Settings(BaseSettings):
    """Everything the service can be told; read from ``HONING_*`` variables by default."""

    model_config = SettingsConfigDict(env_prefix="HONING_", extra="ignore")

    store_url: str = Field(default_factory=default_store_url)
    admin_key: str | None = None
    admin_key_file: Path | None = None
    max_body_bytes: int = Field(default=8 * 1024 * 1024, ge=1024)
    refit_workers: int = Field(default=1, ge=0)
    lease_seconds: float = Field(default=3600.0, ge=1, le=604800)
    log_level: str = "info"

    @field_validator("log_level")
    @classmethod
    def _known_level(cls, value: str) -> str:
        if value.lower() not in {"debug", "info", "warning", "error", "critical"}:
            raise ValueError("log_level must be debug, info, warning, error or critical")
        return value.lower()

    def resolved_admin_key(self) -> str | None:
        """The admin key, read from ``admin_key_file`` when that is given (first line)."""
        if self.admin_key_file is not None:
            key = self.admin_key_file.read_text().strip()
            if not key:
                raise ValueError(f"admin key file {self.admin_key_file} is empty")
            return key
        return self.admin_key or None
