"""Settings from environment variables with the prefix APPORTION_ (pydantic-settings).

Every variable has a safe default: the embedded SQLite file under ./var/ is the default store;
PostgreSQL (postgresql+psycopg://...) is the production one.
"""

from __future__ import annotations

from functools import lru_cache
from typing import Literal

from pydantic import Field
from pydantic_settings import BaseSettings, SettingsConfigDict


class Settings(BaseSettings):
    model_config = SettingsConfigDict(env_prefix="APPORTION_", extra="ignore")

    database_url: str = Field(
        "sqlite:///./var/apportion.db", description="SQLAlchemy URL of the store"
    )
    blob_uri: str = Field(
        "./var/blobs",
        description="root of the blob store: a local directory, or any URI pyarrow's "
        "filesystems read (s3://bucket/prefix)",
    )
    readout_source_prefixes: list[str] = Field(
        default_factory=list,
        description="URI prefixes a readout by reference may name (JSON list, e.g. "
        '["s3://lake/experiments/", "/mnt/exports/"]); empty: by reference is off',
    )
    upload_dir: str | None = Field(
        None,
        description="where upload bodies are spooled while they are validated "
        "(default: the system's temporary directory)",
    )
    max_upload_bytes: int = Field(
        512 * 1024 * 1024, gt=0, description="largest accepted upload body"
    )
    max_assign_bytes: int = Field(
        64 * 1024, gt=0, description="largest accepted body of POST /v1/plans/{plan}/assign (413)"
    )
    max_assign_batch_bytes: int = Field(
        16 * 1024 * 1024,
        gt=0,
        description="largest accepted body of POST /v1/plans/{plan}/assign/batch (413); "
        "10,000 members with ten features take about 2.5 MB",
    )
    max_json_bytes: int = Field(
        1024 * 1024,
        gt=0,
        description="largest accepted JSON request body (the lookup routes keep their own limit)",
    )
    watch_max_flag_disagreement: float = Field(
        0.01,
        ge=0,
        le=1,
        description="largest share of watch rows whose holdout flag may disagree with the lookup",
    )
    poll_interval_seconds: float = Field(
        1.0, gt=0, description="how often each process checks for plan changes"
    )
    log_level: Literal["DEBUG", "INFO", "WARNING", "ERROR"] = "INFO"
    migrate_on_start: bool = Field(True, description="apply migrations when the server starts")
    run_jobs_in_process: bool = Field(
        True, description="run fit and report jobs in a worker thread of the server"
    )
    held_out_folds: int = Field(
        5,
        ge=0,
        le=20,
        description="folds of the cross-fitted held-out evaluation each plan draft queues as a "
        "job (0 turns it off; the method comparison sets its own folds)",
    )
    comparison_workers: int = Field(
        0,
        ge=0,
        le=64,
        description="processes that run the folds of a method comparison or of a draft's held-out "
        "evaluation at once (0: min(2, cores); "
        "1: one fold after the other in the job's own process; readouts under 50,000 units "
        "always run in the job's process)",
    )
    job_stale_seconds: float = Field(
        600.0, gt=0, description="a running job without a heartbeat this long is reclaimed"
    )
    metrics_labels: list[Literal["plan", "version", "arm", "metric"]] = Field(
        ["plan", "version", "arm", "metric"],
        description="business labels /metrics reports (JSON list); the others read 'redacted'. "
        "/metrics needs no key: keep it behind the cluster network",
    )
    api_docs: bool = Field(
        False,
        description="serve the interactive API docs at /docs; they load their script and style "
        "from a public CDN, so leave this off outside a developer's machine (the schema itself "
        "is always at /openapi.json)",
    )
    db_pool_size: int = Field(
        40, gt=0, description="connection pool size (sized to the request threadpool)"
    )
    fit_engine_min_rows: int = Field(
        2_000_000,
        ge=0,
        description="readouts with more rows than this are fitted by DuckDB over their Parquet "
        "files instead of in memory (unless a Spark master is set)",
    )
    duckdb_memory_limit: str = Field(
        "1GB",
        pattern=r"^[0-9]+(\.[0-9]+)?\s*(B|KB|MB|GB|TB|KiB|MiB|GiB|TiB)$",
        description="DuckDB's memory limit for a fit; beyond it the working table spills to disk",
    )
    spark_master: str | None = Field(
        None,
        description="Spark master URL (e.g. spark://host:7077, local[2]); set, fits run on Spark",
    )
    engine_scratch_dir: str | None = Field(
        None,
        description="where engines keep working files (DuckDB spill, Spark's working table); "
        "on a Spark cluster a location every executor can read. Default: the system temp dir",
    )


@lru_cache
def get_settings() -> Settings:
    return Settings()
