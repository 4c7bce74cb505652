"""Service settings, from ``VEIL_...`` environment variables (pydantic-settings).

=================================  ==================  ======================================================
variable                           default             meaning
=================================  ==================  ======================================================
``VEIL_REGISTRY``                  ``./veil-registry``  registry directory or fsspec URL (read only)
``VEIL_NAMES``                     all                 JSON list of eraser names to serve, e.g. ``["a","b"]``
``VEIL_ALIAS``                     ``live``            the alias served when a request pins nothing
``VEIL_POLL_SECONDS``              ``10``              how often aliases are re-resolved (0: only on reload)
``VEIL_MAX_BODY_BYTES``            ``67108864``        larger request bodies get 413
``VEIL_MAX_PINNED_VERSIONS``       ``8``               versions other than the alias's kept loaded for pinning
``VEIL_RESERVOIR_SIZE``            ``2048``            distinct raw vectors per eraser kept for ``GET .../drift``
``VEIL_ADMIN_TOKEN``               unset               bearer token of admin routes; unset disables them
``VEIL_DATA_TOKEN``                unset               if set, data routes need this bearer token too
``VEIL_THRESHOLDS``                unset               JSON overriding the cards' alert thresholds
``VEIL_CORS_ORIGINS``              ``[]``              JSON list of origins allowed by CORS (off if empty)
``VEIL_LOG_LEVEL``                 ``info``            log level of the JSON request log
``VEIL_BLAS_THREADS``              ``1``               BLAS threads per process (scale with workers instead)
``VEIL_BENCHMARK_ECHO``            ``false``           adds ``POST /v1/bench/echo`` (benchmarks only)
``VEIL_SECRETS_DIR``               unset               a folder of files named like the variables (Docker
                                                       secrets: ``/run/secrets/veil_admin_token``)
=================================  ==================  ======================================================
"""

from __future__ import annotations

import os
from typing import Any

from pydantic import Field, SecretStr, field_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

from veil.checks.thresholds import AlertThresholds
from veil.registry.naming import check_name


def load_settings() -> ServiceSettings:
    """Settings from the environment, and from files in ``VEIL_SECRETS_DIR`` if that is set."""
    secrets = os.environ.get("VEIL_SECRETS_DIR")
    # _secrets_dir is pydantic-settings' per-instance override (mypy sees only the declared fields).
    return ServiceSettings(_secrets_dir=secrets) if secrets else ServiceSettings()  # type: ignore[call-arg]


class ServiceSettings(BaseSettings):
    """Everything the service is configured with; see the module docstring for the variables."""

    model_config = SettingsConfigDict(env_prefix="VEIL_", extra="ignore")

    registry: str = "./veil-registry"
    names: list[str] = Field(default_factory=list)
    alias: str = "live"
    poll_seconds: float = Field(default=10.0, ge=0)
    max_body_bytes: int = Field(default=64 << 20, gt=0)
    max_pinned_versions: int = Field(default=8, ge=0)
    reservoir_size: int = Field(default=2048, ge=0)
    admin_token: SecretStr | None = None
    data_token: SecretStr | None = None
    thresholds: dict[str, Any] | None = None
    cors_origins: list[str] = Field(default_factory=list)
    log_level: str = "info"
    blas_threads: int = Field(default=1, ge=1)
    benchmark_echo: bool = False

    @field_validator("names")
    @classmethod
    def _valid_names(cls, names: list[str]) -> list[str]:
        return [check_name(name) for name in names]

    @field_validator("alias")
    @classmethod
    def _valid_alias(cls, alias: str) -> str:
        return check_name(alias, what="alias")

    @field_validator("thresholds")
    @classmethod
    def _valid_thresholds(cls, value: dict[str, Any] | None) -> dict[str, Any] | None:
        if value is not None:
            AlertThresholds.from_dict(value)
        return value
