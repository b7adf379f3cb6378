"""One frozen settings object, built once at start-up and passed down.

Precedence: command-line flags, then ``STREAMGROUP_<NAME>`` environment variables, then an
optional TOML file (``--config``), then the defaults below. Unknown names in the file or
the environment are errors. Nothing else in the package reads the environment.
"""

from __future__ import annotations

import dataclasses
import math
import os
import socket
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, fields
from typing import Any
from urllib.parse import urlsplit, urlunsplit

from .core.types import EngineConfig
from .errors import ConfigError
from .keys import DEFAULT_NS, valid_namespace

ENV_PREFIX = "STREAMGROUP_"


@dataclass(frozen=True)
class Settings:
    redis: str = "redis://127.0.0.1:6379/0"
    ns: str = DEFAULT_NS
    alpha: float = 1e-3
    alpha_slack: float = 0.03  # randomised boundary: errors up to alpha*(1+slack) may commit
    inflight: int = 1
    max_outstanding: int = 10_000
    budget: int = 0
    item_ceiling: int = 200
    question_timeout: float = 600.0  # seconds
    check_rate: float = 0.0
    seed: int = 0
    batch: int = 500  # entries per read at the most; hold_ms sizes each read below it
    hold_ms: float = 0.8  # Redis's time per batch transaction to aim for (0: always `batch`)
    block_ms: int = 1000
    consumer: str = ""  # empty: hostname-pid
    claim_idle: float = 60.0  # seconds before another consumer's pending entry is claimed
    pack_questions: bool = False
    question_columns: bool = False  # with pack_questions: each pack a map of arrays
    snapshot_every: float = 30.0  # seconds between engine snapshots
    metrics_addr: str = "127.0.0.1:9464"  # "" disables the endpoint
    log_level: str = "info"
    log_format: str = "auto"  # auto | json | console
    grace: float = 10.0  # seconds allowed to finish the batch in hand on SIGTERM
    aid_window: int = 100_000  # recent producer aids remembered for deduplication
    questions_maxlen: int = 100_000  # approximate caps of the output streams (0 = none)
    decisions_maxlen: int = 100_000
    dead_maxlen: int = 100_000
    history_every: float = 5.0  # seconds between progress samples in {NS}:history
    lease_ttl: float = 15.0  # seconds a worker's hold on the namespace lasts unless renewed
    keep_memory: bool = True  # keep freed memory in the process (stream.worker.keep_memory)
    nice: int = 0  # scheduling niceness the worker takes at start (stream.worker.tune_process)

    def __post_init__(self) -> None:
        def bad(name: str, why: str) -> ConfigError:
            return ConfigError(f"setting {name}: {why} (got {getattr(self, name)!r})")

        parts = urlsplit(self.redis)
        if parts.scheme not in ("redis", "rediss", "unix"):
            raise bad("redis", "must be a redis://, rediss:// or unix:// URL")
        if not valid_namespace(self.ns):
            raise bad("ns", "use 1-64 letters, digits, '_', '.' or '-'")
        if not (0.0 < self.alpha < 0.5) or math.isnan(self.alpha):
            raise bad("alpha", "must be in (0, 0.5)")
        for name in ("inflight", "max_outstanding", "item_ceiling", "batch", "aid_window"):
            if getattr(self, name) < 1:
                raise bad(name, "must be at least 1")
        if self.inflight > 64:
            raise bad("inflight", "must be at most 64")
        if not (0 <= self.seed < 2**32):
            raise bad("seed", "must be in [0, 2**32)")
        if self.budget < 0:
            raise bad("budget", "must be 0 (unlimited) or positive")
        if not (0.0 <= self.check_rate <= 0.5):
            raise bad("check_rate", "must be in [0, 0.5]")
        if not (0.0 <= self.alpha_slack <= 0.25):
            raise bad("alpha_slack", "must be in [0, 0.25]")
        for name in ("questions_maxlen", "decisions_maxlen", "dead_maxlen"):
            if getattr(self, name) < 0:
                raise bad(name, "must be 0 (uncapped) or positive")
        for name in ("question_timeout", "claim_idle", "snapshot_every", "grace",
                     "history_every"):
            v = getattr(self, name)
            if not (v > 0) or math.isinf(v):
                raise bad(name, "must be a positive number of seconds")
        if not (0 <= self.nice <= 19):
            raise bad("nice", "must be in [0, 19] (the worker may lower its own priority, "
                      "not raise it)")
        if not (self.hold_ms >= 0) or math.isinf(self.hold_ms):
            raise bad("hold_ms", "must be 0 (reads of `batch` entries) or a positive number "
                      "of milliseconds")
        if self.block_ms < 0:
            raise bad("block_ms", "must be >= 0")
        if not (self.lease_ttl >= 2 * self.block_ms / 1000 and self.lease_ttl >= 0.1
                ) or math.isinf(self.lease_ttl):
            raise bad("lease_ttl", "must be at least 0.1 seconds and twice block_ms")
        if self.log_level.lower() not in ("debug", "info", "warning", "error"):
            raise bad("log_level", "must be debug, info, warning or error")
        if self.log_format not in ("auto", "json", "console"):
            raise bad("log_format", "must be auto, json or console")
        if self.metrics_addr:
            host, _, port = self.metrics_addr.rpartition(":")
            if not host or not port.isdigit() or not (0 <= int(port) < 65536):
                raise bad("metrics_addr", "must be HOST:PORT, or empty to disable")

    @property
    def consumer_name(self) -> str:
        return self.consumer or f"{socket.gethostname()}-{os.getpid()}"

    @property
    def redacted_redis(self) -> str:
        """The Redis URL with any password replaced, safe for logs and metrics."""
        return redact_url(self.redis)

    def engine_config(self) -> EngineConfig:
        return EngineConfig(
            alpha=self.alpha,
            inflight=self.inflight,
            max_outstanding=self.max_outstanding,
            budget=self.budget,
            item_ceiling=self.item_ceiling,
            question_timeout_ms=int(self.question_timeout * 1000),
            check_rate=self.check_rate,
            alpha_slack=self.alpha_slack,
            seed=self.seed,
        )

    def replace(self, **changes: Any) -> Settings:
        return dataclasses.replace(self, **changes)


def redact_url(url: str) -> str:
    parts = urlsplit(url)
    if "password=" in parts.query:  # redis-py also takes ?password=...: mask it too
        query = "&".join("password=***" if q.startswith("password=") else q
                         for q in parts.query.split("&"))
        parts = parts._replace(query=query)
        url = urlunsplit(parts)
    if parts.password is None and parts.username is None:
        return url
    host = parts.hostname or ""
    if parts.port:
        host = f"{host}:{parts.port}"
    user = parts.username or ""
    netloc = f"{user}:***@{host}" if parts.password is not None else f"{user}@{host}"
    return urlunsplit((parts.scheme, netloc, parts.path, parts.query, parts.fragment))


FIELD_TYPES: dict[str, type] = {f.name: type(f.default) for f in fields(Settings)}


def _coerce(name: str, raw: Any, origin: str) -> Any:
    want = FIELD_TYPES[name]
    try:
        if want is bool:
            if isinstance(raw, bool):
                return raw
            s = str(raw).strip().lower()
            if s in ("1", "true", "yes", "on"):
                return True
            if s in ("0", "false", "no", "off", ""):
                return False
            raise ValueError(raw)
        if want is int:
            if isinstance(raw, bool):
                raise ValueError(raw)
            if isinstance(raw, float) and not raw.is_integer():
                raise ValueError(raw)
            return int(str(raw).strip()) if not isinstance(raw, (int, float)) else int(raw)
        if want is float:
            if isinstance(raw, bool):
                raise ValueError(raw)
            return float(raw)
        return str(raw)
    except (TypeError, ValueError):
        raise ConfigError(
            f"setting {name} from {origin}: expected {want.__name__}, got {raw!r}"
        ) from None


def load_settings(
    flags: Mapping[str, Any] | None = None,
    env: Mapping[str, str] | None = None,
    config_file: str | None = None,
) -> Settings:
    """Build the settings from flags (None values ignored), environment and TOML file."""
    env = os.environ if env is None else env
    values: dict[str, Any] = {}
    path = config_file or env.get(ENV_PREFIX + "CONFIG")
    if path:
        try:
            with open(path, "rb") as fh:
                data = tomllib.load(fh)
        except FileNotFoundError:
            raise ConfigError(f"config file {path}: not found") from None
        except (OSError, tomllib.TOMLDecodeError) as exc:
            raise ConfigError(f"config file {path}: {exc}") from None
        data = data.get("streamgroup", data) if isinstance(data.get("streamgroup"), dict) else data
        for key, raw in data.items():
            name = key.replace("-", "_")
            if name not in FIELD_TYPES:
                raise ConfigError(f"config file {path}: unknown setting {key!r}")
            values[name] = _coerce(name, raw, f"config file {path}")
    for key, raw in env.items():
        if not key.startswith(ENV_PREFIX) or key == ENV_PREFIX + "CONFIG":
            continue
        name = key[len(ENV_PREFIX):].lower()
        if name not in FIELD_TYPES:
            raise ConfigError(f"environment variable {key}: unknown setting")
        values[name] = _coerce(name, raw, f"environment variable {key}")
    for name, raw in (flags or {}).items():
        if raw is None:
            continue
        if name not in FIELD_TYPES:
            raise ConfigError(f"unknown setting {name!r}")
        values[name] = _coerce(name, raw, f"flag --{name.replace('_', '-')}")
    return Settings(**values)
