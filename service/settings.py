"""Service settings: every limit of the HTTP service, read from GEOTWEEN_* environment variables.

Units: bytes, pixels, frames, targets, seconds. Unsafe values are refused when the settings are
built (at start-up), with a message naming the setting, the bad value and the allowed range.
"""
from __future__ import annotations

from pathlib import Path
from typing import Annotated

from pydantic import Field, SecretStr, ValidationError, field_validator, model_validator
from pydantic_settings import BaseSettings, NoDecode, SettingsConfigDict

from .registry import Registry, resolve_root

MIB = 1024 * 1024
MIN_KEY_LENGTH = 16  # shorter shared secrets are guessable; common practice for bearer keys


class Settings(BaseSettings):
    """Named limits of the service; env names are GEOTWEEN_<FIELD> (GEOTWEEN_API_KEYS is comma-separated)."""

    # hide_input_in_errors: a refused key must never be echoed into logs
    model_config = SettingsConfigDict(env_prefix="GEOTWEEN_", extra="ignore", frozen=True,
                                      hide_input_in_errors=True)

    registry: Path | None = Field(None, description="registry folder (None: $GEOTWEEN_REGISTRY or the default)")
    api_keys: Annotated[list[SecretStr], NoDecode] = Field(
        default_factory=list, description="keys that may write (train, delete); none = writes refused")
    scene_root: Path | None = Field(None, description="if set, training scenes must lie inside this folder")
    max_body_bytes: int = Field(8 * MIB, description="largest request body, bytes")
    max_image_pixels: int = Field(16_000_000, description="largest uploaded image, width x height pixels")
    max_frames: int = Field(64, description="most in-between frames per request")
    max_fill_sync: int = Field(32, description="most fill targets answered at once; more run as a job")
    max_fill_targets: int = Field(4096, description="most fill targets per request")
    max_output_pixels: int = Field(64 * 1024 * 1024, description="most frame pixels (frames x width x height) one "
                                                                 "answer may hold; a fill over it runs as a job")
    max_job_pixels: int = Field(4096 * 1024 * 1024, description="most frame pixels one fill job may hold")
    max_map_codes: int = Field(1026, description="most latent codes placed on the map per request")
    inference_workers: int = Field(2, description="threads of the one executor that runs torch work")
    job_queue: int = Field(16, description="most jobs queued or running at once")
    job_workers: int = Field(1, description="jobs run at the same time (each takes inference workers)")
    job_retention: float = Field(3600.0, description="seconds a finished job and its result are kept")
    jobs_kept: int = Field(64, description="most finished jobs kept; the oldest are dropped first")
    model_cache: int = Field(4, description="most models (name@version) kept loaded")
    max_train_steps: int = Field(20_000, description="most training steps a training job may ask for")
    max_train_seconds: float = Field(3600.0, description="longest training budget a job may ask for, seconds")
    database_url: SecretStr | None = Field(None, description="the jobs' database, e.g. postgresql://user:pw@host/db "
                                                             "(None: jobs.sqlite in the registry folder)")
    store_url: str | None = Field(None, pattern=r"^s3://[a-z0-9][a-z0-9.-]{1,61}[a-z0-9](/.*)?$",
                                  description="bundles in an S3-compatible object store, s3://bucket/prefix "
                                              "(None: in the registry folder)")
    store_endpoint: str | None = Field(None, description="the object store's endpoint URL, for S3-compatible "
                                                         "servers (None: the AWS default)")
    run_jobs: bool = Field(True, description="serve also runs jobs; false: it only queues them for workers")
    worker_id: str = Field("local", pattern=r"^[A-Za-z0-9_.-]{1,64}$",
                           description="this process's runner id: a restarted runner with the same id resumes "
                                       "the jobs it was running; two live runners must not share one")
    checkpoint_every: int = Field(200, description="training steps between a training job's checkpoints")
    max_inflight: int | None = Field(None, description="inference requests queued on the pool or running at "
                                                        "once; more get 429 (None: 4 x inference_workers)")
    request_deadline: float = Field(10.0, description="seconds a request's inference may wait for a worker; "
                                                      "later it gets 503 and does no work")
    drain_seconds: float = Field(5.0, description="after SIGTERM, seconds /readyz answers 503 while requests "
                                                  "are still served (a load balancer stops sending)")
    shutdown_grace: float = Field(20.0, description="then, seconds requests in flight may take to finish "
                                                    "before they are cut off and the process exits")

    @field_validator("api_keys", mode="before")
    @classmethod
    def _split_keys(cls, value):
        if isinstance(value, str):
            return [k.strip() for k in value.split(",") if k.strip()]
        return value

    @field_validator("api_keys")
    @classmethod
    def _check_keys(cls, keys: list[SecretStr]) -> list[SecretStr]:
        for i, key in enumerate(keys):
            raw = key.get_secret_value()
            if len(raw) < MIN_KEY_LENGTH or any(c.isspace() for c in raw):
                # the key itself is never echoed back
                raise ValueError(f"api_keys[{i}]: a key of {len(raw)} characters is not allowed; keys need "
                                 f">= {MIN_KEY_LENGTH} characters and no whitespace")
        return keys

    @model_validator(mode="after")
    def _check_limits(self) -> "Settings":
        ranges = {  # name: (low, high), both inclusive
            "max_body_bytes": (1024, 1024 * MIB),
            "max_image_pixels": (1, 400_000_000),
            "max_frames": (1, 1024),
            "max_fill_sync": (1, 4096),
            "max_fill_targets": (1, 1_000_000),
            "max_output_pixels": (64, 2 ** 34),
            "max_job_pixels": (64, 2 ** 40),
            "max_map_codes": (1, 1_000_000),
            "inference_workers": (1, 64),
            "job_queue": (1, 10_000),
            "job_workers": (1, 64),
            "job_retention": (1.0, 30 * 86400.0),
            "jobs_kept": (1, 100_000),
            "model_cache": (1, 256),
            "max_train_steps": (1, 10_000_000),
            "max_train_seconds": (1.0, 7 * 86400.0),
            "checkpoint_every": (1, 1_000_000),
            "max_inflight": (1, 100_000),
            "request_deadline": (0.01, 3600.0),
            "drain_seconds": (0.0, 600.0),
            "shutdown_grace": (0.1, 3600.0),
        }
        for name, (lo, hi) in ranges.items():
            value = getattr(self, name)
            if value is None:  # unset: a default derived from other settings (max_inflight)
                continue
            if not lo <= value <= hi:
                raise ValueError(f"{name}: {value!r} is outside the allowed range [{lo}, {hi}]")
        if self.max_fill_targets < self.max_fill_sync:
            raise ValueError(f"max_fill_targets: {self.max_fill_targets} is below max_fill_sync="
                             f"{self.max_fill_sync}; it must be >= max_fill_sync")
        return self

    @property
    def inflight_limit(self) -> int:
        """max_inflight, or 4 x inference_workers when unset (a short queue per worker: enough to keep
        every worker busy between requests, short enough that a queued request waits a few service times)."""
        return self.max_inflight if self.max_inflight is not None else 4 * self.inference_workers

    @property
    def jobs_database_url(self) -> str:
        """The jobs' database: database_url, else SQLite in the registry folder (local disk only)."""
        if self.database_url is not None:
            return self.database_url.get_secret_value()
        root = self.registry_root
        root.mkdir(parents=True, exist_ok=True)
        return f"sqlite:///{root / 'jobs.sqlite'}"

    def open_registry(self) -> Registry:
        """The registry these settings name: its index in PostgreSQL when database_url is set, its
        bundles in the object store when store_url is set; the registry folder holds the rest."""
        root = self.registry_root
        store = None
        if self.store_url is not None:
            from .store import ObjectStore

            store = ObjectStore(self.store_url, cache=root / "cache", endpoint=self.store_endpoint)
        url = self.database_url.get_secret_value() if self.database_url is not None else None
        return Registry.open(root, index_url=url, store=store)

    @property
    def jobs_folder(self) -> Path:
        """Where jobs keep their checkpoints and half-built bundles (beside the registry's models)."""
        return self.registry_root / "jobs"

    @property
    def registry_root(self) -> Path:
        """The registry folder this service serves (explicit, else $GEOTWEEN_REGISTRY, else default)."""
        return resolve_root(self.registry)

    @classmethod
    def load(cls, **overrides) -> "Settings":
        """Settings from the environment plus `overrides`; a ValueError with one short line per
        refused setting (no input values) when any is unsafe."""
        try:
            return cls(**overrides)
        except ValidationError as exc:
            lines = []
            for err in exc.errors(include_input=False, include_url=False):
                where = ".".join(str(p) for p in err.get("loc", ()))
                msg = str(err.get("msg", "")).removeprefix("Value error, ")
                lines.append(f"{where}: {msg}" if where else msg)
            raise ValueError("refused settings: " + "; ".join(lines)) from None

    def key_bytes(self) -> list[bytes]:
        return [k.get_secret_value().encode("utf-8") for k in self.api_keys]
