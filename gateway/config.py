"""Configuration: pydantic models per section, loaded from TOML with environment overrides.

Precedence, lowest first: built-in defaults, the TOML file, ``BOUTLINE_<SECTION>_<KEY>``
environment variables (e.g. ``BOUTLINE_MQTT_HOST=10.0.0.5``). Secrets (the MQTT password and
the InfluxDB password/token) come from ``BOUTLINE_MQTT_PASSWORD`` / ``BOUTLINE_INFLUX_TOKEN``
style variables or from a file named by ``password_file`` / ``token_file``; they are held as
``SecretStr`` and never printed.

>>> cfg = Settings()
>>> cfg.mqtt.port, cfg.http.bind
(1883, '127.0.0.1')
"""

from __future__ import annotations

import os
import re
import tomllib
from pathlib import Path
from typing import Any, Literal
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    SecretStr,
    ValidationError,
    field_validator,
    model_validator,
)

from .errors import ConfigError

__all__ = [
    "ENV_PREFIX",
    "AlertsSettings",
    "BoutsSettings",
    "BudgetsSettings",
    "HttpSettings",
    "InfluxSettings",
    "LimitsSettings",
    "ModelSettings",
    "MqttSettings",
    "OutputsSettings",
    "ProcessSettings",
    "Settings",
    "SiteSettings",
    "SmoothingSettings",
    "StoreSettings",
    "WindowsSettings",
    "effective_settings",
    "example_toml",
    "load_settings",
    "to_toml",
]

ENV_PREFIX = "BOUTLINE_"
_ID = r"^[A-Za-z0-9_.-]{1,64}$"
# Size cap for a config file: a real one is a few kB; anything huge is a mistake or hostile.
_MAX_CONFIG_BYTES = 1_000_000
_CONTROL = re.compile(r"[\x00-\x1f]")


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", validate_default=True, frozen=True)


class SiteSettings(_Section):
    """Where the gateway stands and how days are counted."""

    id: str = Field("home-farm", pattern=_ID, description="site segment of every topic")
    timezone: str = Field("UTC", description="IANA zone for local days, e.g. Europe/Dublin")
    day_start_hour: int = Field(0, ge=0, le=23, description="hour a budget day starts")
    assignments: str = Field("", description="collar->animal CSV or TOML; empty: none")
    unknown_collars: Literal["adopt", "refuse"] = Field(
        "adopt", description="adopt: an unknown collar becomes an animal named after it"
    )

    @field_validator("timezone")
    @classmethod
    def _zone(cls, v: str) -> str:
        try:
            ZoneInfo(v)
        except (ZoneInfoNotFoundError, ValueError) as exc:
            raise ValueError("not an IANA time zone name such as Europe/Dublin or UTC") from exc
        return v


class MqttSettings(_Section):
    """The broker collars publish to, and that barn displays read from."""

    host: str = Field("127.0.0.1", min_length=1)
    port: int = Field(1883, ge=1, le=65535)
    protocol: Literal["5", "3.1.1"] = "5"
    client_id: str = Field("boutline-gateway", pattern=r"^[A-Za-z0-9_.-]{1,64}$")
    topic_prefix: str = Field("barn", pattern=r"^[A-Za-z0-9_.-]+(/[A-Za-z0-9_.-]+)*$")
    qos: Literal[0, 1] = 1
    keepalive_s: int = Field(30, ge=5, le=3600)
    session_expiry_s: int = Field(86400, ge=0, le=2**32 - 1)
    reconnect_min_s: float = Field(1.0, gt=0, le=60)
    reconnect_max_s: float = Field(60.0, gt=0, le=3600)
    username: str = ""
    password: SecretStr = SecretStr("")
    password_file: str = ""
    tls: bool = False
    ca_file: str = ""
    cert_file: str = ""
    key_file: str = ""

    @model_validator(mode="after")
    def _check(self) -> MqttSettings:
        if self.reconnect_max_s < self.reconnect_min_s:
            raise ValueError("reconnect_max_s must be >= reconnect_min_s")
        if bool(self.cert_file) != bool(self.key_file):
            raise ValueError("cert_file and key_file go together: give both or neither")
        if (self.cert_file or self.ca_file) and not self.tls:
            raise ValueError("ca_file/cert_file given but tls = false: set tls = true")
        return self


class ModelSettings(_Section):
    path: str = Field("", description="ONNX model file; empty: the shipped default")
    watch: bool = Field(True, description="hot-reload when the file changes or on SIGHUP")
    batch_max: int = Field(1024, ge=1, le=65536, description="windows per inference call")


class WindowsSettings(_Section):
    """Ring buffers and how much imperfection a window may carry."""

    max_missing: float = Field(0.2, ge=0, le=0.9, description="share of a window that may be gap")
    reorder_s: float = Field(5.0, ge=0, le=120, description="late frames accepted within this")
    # 20 s = a window + 2 hops of the default model, all the ring needs (docs/performance.md)
    buffer_s: float = Field(20.0, ge=10, le=3600, description="ring buffer length per animal")
    clock_future_s: float = Field(300.0, ge=0, le=86400)
    clock_past_s: float = Field(86400.0, ge=0, le=30 * 86400)
    clock_rule: Literal["substitute", "reject"] = Field(
        "substitute", description="a frame outside the clock bounds: receive time or reject"
    )


class SmoothingSettings(_Section):
    """Online HMM over the model's posteriors (gateway/smoothing.py); values: common practice, no source."""

    lag_s: float = Field(60.0, ge=0, le=600, description="a hop is decided this much later")
    bridge_s: float = Field(60.0, ge=0, le=3600, description="no-data up to this is bridged")
    prior: Literal["card", "stationary", "uniform"] = Field(
        "card", description="posteriors / prior; card: class_prior, else stationary"
    )
    dwell_s: float = Field(300.0, gt=0, le=86400, description="mean bout, model w/o transitions")


def _bout_min(default: float, why: str) -> Any:
    return Field(default, ge=0, le=86400, description=f"runs <= this are no bout; {why}")


def _bout_gap(default: float, why: str) -> Any:
    return Field(default, ge=0, le=86400, description=f"gaps < this are bridged; {why}")


# Meal criteria span 1.9-49.1 min by method (Tolkamp & Kyriazakis, FIELD.md); 5 min is our
# pick inside that range. It bridges only no-data and fragments: a real bout of another
# behaviour always ends the meal (gateway/bouts.py).
_MEAL = "Tolkamp & Kyriazakis range"
_CP = "common practice, no source"


class BoutsSettings(_Section):
    """Per-behaviour minimum bout and bout criterion interval, seconds (gateway/bouts.py)."""

    grazing_min_s: float = _bout_min(60.0, _CP)
    grazing_criterion_s: float = _bout_gap(300.0, _MEAL)
    feeding_min_s: float = _bout_min(60.0, _CP)
    feeding_criterion_s: float = _bout_gap(300.0, _MEAL)
    # About two cud cycles of ~46 s (Braun et al. 2015, FIELD.md).
    ruminating_min_s: float = _bout_min(90.0, "two cud cycles, Braun 2015")
    ruminating_criterion_s: float = _bout_gap(300.0, _CP)
    # Lying: single readings of <= 1 min are dropped (Bonk et al. 2013, J Dairy Sci, FIELD.md).
    resting_min_s: float = _bout_min(60.0, "Bonk et al. 2013")
    resting_criterion_s: float = _bout_gap(300.0, _CP)
    walking_min_s: float = _bout_min(20.0, _CP)
    walking_criterion_s: float = _bout_gap(30.0, _CP)
    other_min_s: float = _bout_min(60.0, "classes not named above; " + _CP)
    other_criterion_s: float = _bout_gap(120.0, "classes not named above; " + _CP)

    def min_bout_s(self, behaviour: str) -> float:
        """Minimum bout of a class; ``other_min_s`` for classes without their own key."""
        return float(getattr(self, f"{behaviour}_min_s", self.other_min_s))

    def criterion_s(self, behaviour: str) -> float:
        """Bout criterion interval of a class; ``other_criterion_s`` without its own key."""
        return float(getattr(self, f"{behaviour}_criterion_s", self.other_criterion_s))


class BudgetsSettings(_Section):
    """Daily time budgets per animal (gateway/budgets.py); days follow [site] timezone/day_start_hour."""

    final_after_h: float = Field(
        3.0, ge=0, le=72, description="a day is final this long after it ends, bouts open or not"
    )
    emit_interval_s: float = Field(
        900.0, ge=10, le=86400, description="provisional budgets go to the sinks this often"
    )


# Alert defaults. Rumination: a drop of >= 20-30 % against the animal's own 7-10 day baseline,
# or a z-score >= 2-3, is the usual rule (FIELD.md, health signals, common practice); estrus
# activity ~2.8-fold for 8-9 h (Lovendahl & Chagunda 2010, J Dairy Sci, FIELD.md). Hold times,
# floors and the collar limits: common practice, no source.
class AlertsSettings(_Section):
    """Own-baseline alerts (gateway/alerts.py): decision support, never a diagnosis."""

    enabled: bool = True
    baseline_days: int = Field(7, ge=3, le=30, description="full days in each baseline")
    min_baseline_days: int = Field(5, ge=2, le=30, description="fewer usable days: no alert")
    lookback_days: int = Field(14, ge=3, le=60, description="search this far back for them")
    min_coverage: float = Field(0.8, gt=0, le=1, description="a day or window counts from here")
    rumination_drop: float = Field(0.25, gt=0, lt=1, description="raise: 24 h this far below")
    rumination_clear: float = Field(0.15, ge=0, lt=1, description="clear: back within this")
    rumination_min_z: float = Field(
        2.0, ge=0, le=10, description="and this many SDs of her own days below (0: off)"
    )
    rumination_hold_h: int = Field(6, ge=1, le=48, description="raise once it held this long")
    rumination_sustained_h: int = Field(
        48, ge=25, le=168, description="or: the mean of this many hours (a slow decline)"
    )
    rumination_sustained_drop: float = Field(
        0.12, ge=0, lt=1, description="raise: that mean this far below her days' mean (0: off)"
    )
    rumination_sustained_min_z: float = Field(
        1.5, ge=0, le=10, description="and this many SDs of her days' mean below (0: off)"
    )
    rumination_sustained_clear: float = Field(
        0.06, ge=0, lt=1, description="clear: that mean back within this"
    )
    activity_window_h: int = Field(8, ge=1, le=12, description="rolling activity window")
    activity_ratio: float = Field(2.2, gt=1, le=20, description="raise: index this many times")
    activity_clear_ratio: float = Field(1.5, ge=1, le=20, description="clear: below this")
    activity_hold_h: int = Field(2, ge=1, le=24, description="raise once it held this long")
    activity_floor_min: float = Field(
        5.0, ge=0, le=120, description="baseline walking per window never counts below this"
    )
    activity_baseline_days: int = Field(
        14, ge=3, le=60, description="same hours on up to this many days (within lookback)"
    )
    activity_min_z: float = Field(
        3.0, ge=0, le=10, description="and this many SDs of her own same hours above (0: off)"
    )
    activity_min_active_h: int = Field(
        7, ge=0, le=12, description="and walking in this many of the window's hours (0: off)"
    )
    inactive_h: float = Field(12.0, gt=0, le=72, description="no feeding/grazing/walking this long")
    silent_min: float = Field(60.0, gt=0, le=10080, description="no frames this long")
    battery_low_v: float = Field(3.5, gt=0, le=10, description="raise below this voltage")
    battery_clear_v: float = Field(3.6, gt=0, le=10, description="clear above this voltage")
    rotation_deg: float = Field(
        25.0, gt=0, le=180, description="collar roll this far from its baseline"
    )
    rotation_hold_h: float = Field(3.0, gt=0, le=72, description="for this long")

    @model_validator(mode="after")
    def _check(self) -> AlertsSettings:
        if self.min_baseline_days > self.baseline_days:
            raise ValueError("min_baseline_days must be <= baseline_days")
        if self.lookback_days < self.baseline_days:
            raise ValueError("lookback_days must be >= baseline_days")
        if self.rumination_clear >= self.rumination_drop:
            raise ValueError("rumination_clear must be below rumination_drop (hysteresis)")
        if self.activity_clear_ratio >= self.activity_ratio:
            raise ValueError("activity_clear_ratio must be below activity_ratio (hysteresis)")
        if self.rumination_sustained_drop and (
            self.rumination_sustained_clear >= self.rumination_sustained_drop
        ):
            raise ValueError(
                "rumination_sustained_clear must be below rumination_sustained_drop (hysteresis)"
            )
        if self.activity_min_active_h > self.activity_window_h:
            raise ValueError("activity_min_active_h must be <= activity_window_h")
        if self.battery_clear_v <= self.battery_low_v:
            raise ValueError("battery_clear_v must be above battery_low_v (hysteresis)")
        return self


class StoreSettings(_Section):
    data_dir: str = Field("~/.local/share/boutline", min_length=1)
    checkpoint_pages: int = Field(1000, ge=100, le=1_000_000, description="WAL autocheckpoint")
    # 0.1 s keeps window-to-store latency p99 near 0.1 s at 1,000 collars (docs/performance.md)
    commit_interval_s: float = Field(0.1, gt=0, le=60, description="batch writes this long")
    outbox_max_mb: float = Field(200.0, gt=0, le=100_000)
    retention_days: int = Field(400, ge=1, le=36500)


class InfluxSettings(_Section):
    enabled: bool = False
    api: Literal["v1", "v2"] = "v2"
    url: str = Field("http://127.0.0.1:8086", pattern=r"^https?://[^\s/]+(/.*)?$")
    # v1: InfluxDB 1.x and the 1.x compatibility API of later versions
    database: str = "boutline"
    retention_policy: str = ""
    username: str = ""
    password: SecretStr = SecretStr("")
    password_file: str = ""
    # v2
    org: str = "home-farm"
    bucket: str = "boutline"
    token: SecretStr = SecretStr("")
    token_file: str = ""
    batch_size: int = Field(1000, ge=1, le=100_000)
    flush_interval_s: float = Field(5.0, gt=0, le=3600)
    timeout_s: float = Field(10.0, gt=0, le=300)
    retry_max_s: float = Field(300.0, gt=0, le=86400)
    verify_tls: bool = True


class OutputsSettings(_Section):
    mqtt: bool = Field(True, description="publish state, bouts, alerts and status to MQTT")
    state_retained: bool = True
    qos: Literal[0, 1] = 1


class HttpSettings(_Section):
    enabled: bool = True
    bind: str = Field("127.0.0.1", min_length=1, description="loopback unless you mean it")
    port: int = Field(8787, ge=1, le=65535)


class LimitsSettings(_Section):
    max_payload_bytes: int = Field(65536, ge=64, le=1_048_576)
    max_samples: int = Field(1024, ge=1, le=1024)
    max_collars: int = Field(12000, ge=1, le=1_000_000)
    max_frame_rate_hz: float = Field(
        5.0, gt=0, le=1000, description="per collar; frames above it are dropped and counted"
    )
    log_every_s: float = Field(60.0, ge=0, le=3600, description="rate limit of reject logs")


class ProcessSettings(_Section):
    """How the daemon's processes run (gateway/affinity.py, gateway/ingestproc.py)."""

    cpu: str = Field(
        "auto",
        pattern=r"^(auto|none|[0-9]{1,4})$",
        description="keep the pipeline's threads on one CPU: auto, none or a CPU number",
    )
    ingest: str = Field(
        "auto",
        pattern=r"^(auto|process|thread)$",
        description="MQTT client in a process of its own (auto: when two CPUs or more)",
    )


class Settings(BaseModel):
    """Every section; unknown sections and keys are errors (typos must not pass silently)."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    site: SiteSettings = SiteSettings()
    mqtt: MqttSettings = MqttSettings()
    model: ModelSettings = ModelSettings()
    windows: WindowsSettings = WindowsSettings()
    smoothing: SmoothingSettings = SmoothingSettings()
    bouts: BoutsSettings = BoutsSettings()
    store: StoreSettings = StoreSettings()
    influx: InfluxSettings = InfluxSettings()
    outputs: OutputsSettings = OutputsSettings()
    http: HttpSettings = HttpSettings()
    limits: LimitsSettings = LimitsSettings()
    budgets: BudgetsSettings = BudgetsSettings()
    alerts: AlertsSettings = AlertsSettings()
    process: ProcessSettings = ProcessSettings()

    @property
    def data_dir(self) -> Path:
        return Path(os.path.expanduser(self.store.data_dir))


_SECRET_FILES = {
    ("mqtt", "password"): "password_file",
    ("influx", "password"): "password_file",
    ("influx", "token"): "token_file",
}


def _env_overrides(env: dict[str, str]) -> dict[str, dict[str, str]]:
    sections = set(Settings.model_fields)
    out: dict[str, dict[str, str]] = {}
    for name, value in env.items():
        if not name.startswith(ENV_PREFIX):
            continue
        rest = name[len(ENV_PREFIX) :].lower()
        section, _, key = rest.partition("_")
        if section in sections and key:
            out.setdefault(section, {})[key] = value
    return out


def _read_secret_file(path: str, where: str) -> str:
    p = Path(os.path.expanduser(path))
    try:
        if p.stat().st_size > 65536:
            raise ConfigError(f"{where}: {p} is larger than 64 KiB; it should hold one secret")
        return p.read_text(encoding="utf-8").strip()
    except OSError as exc:
        raise ConfigError(f"{where}: cannot read {p} ({exc.strerror}); check the path") from exc
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{where}: {p} is not UTF-8 text") from exc


def _deep_merge(base: dict[str, Any], over: dict[str, Any]) -> dict[str, Any]:
    merged = dict(base)
    for k, v in over.items():
        if isinstance(v, dict) and isinstance(merged.get(k), dict):
            merged[k] = {**merged[k], **v}
        else:
            merged[k] = v
    return merged


def _format_errors(exc: ValidationError, data: dict[str, Any]) -> list[str]:
    problems = []
    for err in exc.errors():
        loc = ".".join(str(p) for p in err["loc"])
        value = data
        for part in err["loc"]:
            value = value.get(part) if isinstance(value, dict) else None  # type: ignore[assignment]
        msg = err["msg"]
        if err["type"] == "extra_forbidden":
            problems.append(f"{loc}: unknown key; check the spelling against boutline.example.toml")
            continue
        if err["type"] == "literal_error":
            msg = msg.replace("Input should be", "allowed:")
        shown = "****" if loc.endswith(("password", "token")) else repr(value)[:60]
        problems.append(f"{loc} = {shown}: {msg}")
    return problems


def load_settings(path: str | Path | None = None, env: dict[str, str] | None = None) -> Settings:
    """Read a TOML file (optional) plus environment overrides; raise ConfigError listing problems."""
    env = dict(os.environ) if env is None else env
    data: dict[str, Any] = {}
    if path is not None:
        p = Path(path)
        try:
            raw = p.read_bytes()
        except OSError as exc:
            raise ConfigError(f"cannot read config file {p}: {exc.strerror}") from exc
        if len(raw) > _MAX_CONFIG_BYTES:
            raise ConfigError(f"config file {p} is {len(raw)} bytes; a config is a few kB")
        try:
            data = tomllib.loads(raw.decode("utf-8"))
        except UnicodeDecodeError as exc:
            raise ConfigError(f"config file {p} is not UTF-8 text (byte {exc.start})") from exc
        except ValueError as exc:  # TOMLDecodeError, and ints beyond Python's digit limit
            raise ConfigError(f"config file {p} is not valid TOML: {str(exc)[:200]}") from exc
    problems = [
        f"{k}: unknown section; allowed: {', '.join(Settings.model_fields)}"
        for k, v in data.items()
        if k not in Settings.model_fields or not isinstance(v, dict)
    ]
    data = {k: v for k, v in data.items() if k in Settings.model_fields and isinstance(v, dict)}
    data = _deep_merge(data, _env_overrides(env))
    for (section, key), file_key in _SECRET_FILES.items():
        sec = data.get(section, {})
        if sec.get(file_key) and not sec.get(key):
            try:
                sec[key] = _read_secret_file(sec[file_key], f"{section}.{file_key}")
            except ConfigError as exc:
                problems.append(str(exc))
    try:
        settings = Settings.model_validate(data)
    except ValidationError as exc:
        problems.extend(_format_errors(exc, data))
        settings = None
    if problems or settings is None:
        raise ConfigError("; ".join(problems), problems=problems)
    return settings


def _mask(value: Any) -> Any:
    if isinstance(value, SecretStr):
        return "****" if value.get_secret_value() else ""
    if isinstance(value, dict):
        return {k: _mask(v) for k, v in value.items()}
    return value


def effective_settings(settings: Settings) -> dict[str, dict[str, Any]]:
    """Every setting as plain values, secrets replaced by ``****`` (never echoed)."""
    return {name: _mask(dict(getattr(settings, name))) for name in Settings.model_fields}


def to_toml(settings: Settings) -> str:
    """Render effective settings as TOML text (secrets masked)."""
    lines: list[str] = []
    for section, values in effective_settings(settings).items():
        lines.append(f"[{section}]")
        for k, v in values.items():
            lines.append(f"{k} = {_toml_value(v)}")
        lines.append("")
    return "\n".join(lines)


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int | float):
        return repr(v)
    s = _CONTROL.sub("", str(v)).replace("\\", "\\\\").replace('"', '\\"')
    return f'"{s}"'


def example_toml() -> str:
    """A fully commented config: every commented value is the default (boutline.example.toml)."""
    out = [
        "# Boutline gateway configuration. Every commented value below is the default;",
        "# uncomment and change what you need. Any key can also be set from the environment",
        "# as BOUTLINE_<SECTION>_<KEY>, e.g. BOUTLINE_MQTT_HOST=10.0.0.5. Secrets (mqtt.password,",
        "# influx.password, influx.token) belong in the environment or in a file named by",
        "# *_file, never in this file. Check a file with: boutline config check FILE",
        "",
    ]
    for name, info in Settings.model_fields.items():
        section = info.annotation
        doc = (section.__doc__ or "").strip().splitlines()
        out.append(f"[{name}]" + (f"  # {doc[0]}" if doc else ""))
        for key, f in section.model_fields.items():  # type: ignore[union-attr]
            value = _toml_value(_mask(f.default))
            line = f"# {key} = {value}"
            if f.description:
                line = f"{line:<44}  # {f.description}"
            out.append(line)
        out.append("")
    return "\n".join(out)
