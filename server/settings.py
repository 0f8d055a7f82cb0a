"""The one settings class. Built in ``main()`` / ``create_app()``, never at import time.

Every field can be set from the environment with the prefix ``HALFWATCH_`` (for example
``HALFWATCH_DATABASE_URL`` or ``HALFWATCH_PORT``). Other parts add their own fields here.
"""

from __future__ import annotations

from pathlib import Path
from typing import Literal

from pydantic import Field, SecretStr, model_validator
from pydantic_settings import BaseSettings, SettingsConfigDict


class Settings(BaseSettings):
    model_config = SettingsConfigDict(env_prefix="HALFWATCH_", extra="ignore")

    # storage
    data_dir: Path = Path("./data")
    database_url: str = Field(
        default="", description="SQLAlchemy URL; empty means a SQLite file halfwatch.db under data_dir"
    )

    db_busy_timeout_ms: int = Field(default=10_000, ge=0, description="SQLite: wait this long for a lock")
    waveform_store: Literal["database", "files"] = Field(
        default="database", description="where new raw waveforms go: the database, or content-addressed "
        "files in waveform_dir (halfwatch waveforms migrate moves existing ones; docs/scale.md)")
    waveform_dir: Path | None = Field(default=None, description="directory of waveform files; empty means "
                                      "<data_dir>/waveforms (shared by every API and worker process)")
    ingest_group_commit: int = Field(default=32, ge=1, le=1000, description="ingest requests committed "
                                     "together in one transaction at most (1: one each)")
    api_key_cache_s: float = Field(default=5.0, ge=0, description="an API key lookup is reused this long; a "
                                   "revoked key is refused within this time (0: look up every request)")

    # HTTP service
    host: str = "127.0.0.1"
    port: int = Field(default=8000, ge=0, le=65535)
    secret_key: str = Field(default="", description="signs session cookies: a long random string, the same "
                            "for every API process; a new one ends every session")
    public_base_url: str = Field(default="http://127.0.0.1:8000", description="base of links in emails")
    session_cookie_secure: bool = False
    session_ttl_h: float = Field(default=12.0, gt=0)
    embedded_worker: bool = Field(default=False, description="run the analysis worker inside the API process")

    # ingestion limits
    max_body_bytes: int = Field(default=64 * 1024 * 1024, gt=0)
    max_samples: int = Field(default=4_194_304, gt=0)
    min_samples: int = Field(default=256, gt=0)
    min_sample_rate_hz: float = Field(default=100.0, gt=0)
    max_sample_rate_hz: float = Field(default=200_000.0, gt=0)
    max_future_s: float = Field(default=300.0, ge=0, description="allowed lead of measured_at")
    max_upload_bytes: int = Field(default=256 * 1024 * 1024, gt=0, description="route ZIP, unpacked")
    max_upload_ratio: float = Field(default=200.0, gt=1, description="route ZIP: largest compression ratio")
    max_manifest_rows: int = Field(default=5000, gt=0)
    max_inflight_ingests: int = Field(default=32, ge=1, description="ingest requests at once; more get 503")
    ingest_retry_after_s: int = Field(default=2, ge=1, description="Retry-After of an overload 503")
    max_queued_jobs: int = Field(default=20_000, ge=0, description="ingest answers 503 while this many "
                                 "analysis jobs wait (0: no limit)")

    # login throttling (per user name and per client address)
    login_max_failures: int = Field(default=5, ge=1, description="failed logins allowed per window")
    login_window_s: float = Field(default=900.0, gt=0, description="seconds over which failed logins count")
    login_hash_slots: int = Field(default=4, ge=1, le=64, description="password hashes at once; each takes "
                                  "argon2_memory_cost_kib; one more waits 2 s, then 503")

    # worker
    worker_poll_s: float = Field(default=0.5, gt=0)
    lease_s: float = Field(default=60.0, gt=0)
    max_attempts: int = Field(default=3, ge=1)
    worker_batch: int = Field(default=4, ge=1, le=100, description="jobs claimed per claim transaction")
    retry_backoff_s: float = Field(default=5.0, ge=0, description="wait before retry n is n times this")

    # retention of raw waveforms (server/retention; results and chart spectra are kept for ever)
    retention_waveform_days: float = Field(default=30.0, gt=0, description="raw waveforms older than this "
                                           "are deleted unless a keep rule holds them")
    retention_alarm_neighbours: int = Field(default=3, ge=0, le=1000, description="readings kept before "
                                            "and after each alarm transition of a point")
    retention_batch: int = Field(default=200, ge=1, le=10_000, description="waveforms deleted per "
                                 "transaction")
    retention_interval_h: float = Field(default=0.0, ge=0, description="the worker applies retention this "
                                        "often (hours); 0: only `halfwatch retention`")

    # alarms and alert emails (server/alarms)
    smtp_host: str = Field(default="", description="SMTP server for alert emails; empty disables sending")
    smtp_port: int = Field(default=25, ge=1, le=65535)
    smtp_security: Literal["none", "starttls", "ssl"] = "none"
    smtp_user: str = ""
    smtp_password: SecretStr = SecretStr("")
    smtp_from: str = "halfwatch@localhost"
    smtp_ca_file: str = Field(default="", description="extra CA certificates (PEM) for an internal relay")
    smtp_timeout_s: float = Field(default=20.0, gt=0)
    mail_poll_s: float = Field(default=5.0, gt=0, description="how often the sender looks at the outbox")
    mail_lease_s: float = Field(default=120.0, gt=0, description="a claimed email is retried after this")
    mail_max_attempts: int = Field(default=12, ge=1)
    mail_backoff_s: float = Field(default=30.0, gt=0, description="first retry delay; doubles per attempt")
    mail_backoff_max_s: float = Field(default=3600.0, gt=0)
    worker_alarm_background: bool = Field(default=True, description="the worker also sends the alert "
                                          "emails and refreshes window fits, in a thread")
    alarm_speed_tolerance: float = Field(default=0.10, gt=0, lt=1, description="vs the point's usual speed")
    alarm_nominal_speed_tolerance: float = Field(default=0.25, gt=0, lt=1, description="vs asset nominal")

    # dashboard (web/, server/routes/pages.py)
    site_timezone: str = Field(default="UTC", description="IANA time zone the dashboard shows times in")
    site_timezones: dict[str, str] = Field(default_factory=dict,
                                           description="per-site IANA zones by site name, JSON object")
    simulated_data: bool = Field(default=False, description="label the dashboard: the plant is simulated")

    # operations: heartbeats, readiness and metrics (server/ops, server/metrics.py)
    heartbeat_s: float = Field(default=10.0, gt=0, description="seconds between heartbeats")
    ready_max_heartbeat_age_s: float = Field(default=60.0, gt=0,
                                             description="/readyz fails when no worker beat within this")
    metrics_token: SecretStr = Field(default=SecretStr(""), description="if set, /metrics needs it")

    # MQTT bridge (halfwatch mqtt-bridge, server/mqtt)
    mqtt_host: str = "127.0.0.1"
    mqtt_port: int = Field(default=1883, ge=1, le=65535)
    mqtt_client_id: str = Field(default="halfwatch-bridge", min_length=1, max_length=120,
                                description="stable id: the broker keeps its session")
    mqtt_topic: str = Field(default="halfwatch/{site}/{point_id}/records",
                            description="topic rule; {site}, {asset}, {point}, {point_id} are whole levels")
    mqtt_reply_topic: str = Field(default="{topic}/reply", description="replies go here")
    mqtt_reply_accepted: bool = Field(default=True, description="also publish a reply for stored records")
    mqtt_username: str = ""
    mqtt_password: SecretStr = SecretStr("")
    mqtt_tls: bool = False
    mqtt_ca_file: str = Field(default="", description="CA bundle for the broker's certificate (TLS)")
    mqtt_cert_file: str = Field(default="", description="client certificate (TLS client authentication)")
    mqtt_key_file: str = ""
    mqtt_tls_insecure: bool = Field(default=False, description="skip host name check")
    mqtt_keepalive_s: int = Field(default=30, ge=5, le=3600)
    mqtt_reconnect_min_s: float = Field(default=1.0, gt=0)
    mqtt_reconnect_max_s: float = Field(default=60.0, gt=0)

    # Argon2id password hashing (tests set these low)
    argon2_time_cost: int = Field(default=3, ge=1)
    argon2_memory_cost_kib: int = Field(default=65536, ge=8)
    argon2_parallelism: int = Field(default=4, ge=1)

    @model_validator(mode="after")
    def _fill_database_url(self) -> Settings:
        if not self.database_url:
            self.database_url = f"sqlite:///{(self.data_dir / 'halfwatch.db').as_posix()}"
        from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

        for name, zone in [("site_timezone", self.site_timezone), *self.site_timezones.items()]:
            try:
                ZoneInfo(zone)
            except (ZoneInfoNotFoundError, ValueError):
                raise ValueError(f"time zone {zone!r} of {name}: use an IANA name such as Europe/Berlin"
                                 ) from None
        if self.min_sample_rate_hz >= self.max_sample_rate_hz:
            raise ValueError("min_sample_rate_hz must be below max_sample_rate_hz")
        return self

    @property
    def is_sqlite(self) -> bool:
        return self.database_url.startswith("sqlite")
