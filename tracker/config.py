"""The TOML configuration file kept beside the store (``tracker.toml``).

Every key has a documented default (README.md, "Configuration"). A missing file means
all defaults. Unknown sections or keys, wrong types and out-of-range values raise
:class:`ConfigError` with one line naming the key, and nothing is written.
"""

from __future__ import annotations

import dataclasses
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

CONFIG_NAME = "tracker.toml"


class ConfigError(Exception):
    """The configuration file is unreadable or holds an invalid value."""


def _positive(x: float) -> bool:
    return x > 0


@dataclass(frozen=True)
class StoreSettings:
    inbox: str = "inbox"            # folder for drop files, relative to the store's folder
    busy_timeout_s: float = 30.0    # how long to wait while another process holds the store
    memory_limit_mb: int = 1024     # DuckDB's buffer memory per connection (it spills to disk beyond)


@dataclass(frozen=True)
class IngestSettings:
    poll_s: float = 2.0             # how often the UI and `tracker watch` look at the inbox
    max_file_mb: float = 256.0      # larger drop files are rejected unread
    warn_sigma: float = 8.0         # a return beyond this many forecast sds is applied with a warning
    reject_abs_return: float = 1.0  # |simple return| at or above this (100%) is rejected


@dataclass(frozen=True)
class ModelSettings:
    volatility: str = "ewma"        # 'ewma' (RiskMetrics 1996) or 'garch' (GARCH(1,1))
    ewma_decay_daily: float = 0.94
    ewma_decay_monthly: float = 0.97
    regimes: int = 2                # per-factor Markov-switching regimes: 2 or 3
    regime_starts: int = 4          # starting points per Markov-switching fit (seeded)
    regime_premium_q: str = "shared"   # 'shared': the regime-aware premium uses the plain local
                                       # level's q (two-step, like its transition matrix);
                                       # 'free': its own maximum-likelihood q
    market_factors: str = "auto"    # 'auto', or the factor ids of the market regime, comma-separated
    market_factors_max: int = 12    # 'auto' keeps at most this many long-history factors (the most
                                    # volatile; the set stays fixed once fitted)
    market_states_min: int = 2
    market_states_max: int = 4
    market_seeds: int = 3
    seed: int = 20261202
    premium_drift_floor: float = 0.05  # prior floor on premium drift: annual Sharpe-ratio units per
                                       # sqrt(year); the likelihood alone cannot see slow drift
    min_obs: int = 120              # fewer observations: 'too little data', no numbers
    refit_every_days: int = 63      # scheduled refit after this many new rows (the DRIFT warning,
                                    # see [warnings] drift_z, also triggers one)


@dataclass(frozen=True)
class AssetSettings:
    window_daily: int = 756         # rolling exposure window: 3 years of trading days
    window_monthly: int = 60


@dataclass(frozen=True)
class ServiceSettings:
    workers: int = 2                # local worker processes for refits
    dask_scheduler: str = "none"    # "none", or a Dask scheduler address such as "tcp://host:8786"


@dataclass(frozen=True)
class UISettings:
    refresh_s: float = 2.0          # how often the UI checks the store for changes


_CHOICES: dict[tuple[str, str], tuple[Any, ...]] = {
    ("models", "volatility"): ("ewma", "garch"),
    ("models", "regime_premium_q"): ("shared", "free"),
    ("models", "regimes"): (2, 3),
}
_RANGES: dict[tuple[str, str], tuple[float, float]] = {
    ("models", "ewma_decay_daily"): (0.5, 0.9999),
    ("models", "ewma_decay_monthly"): (0.5, 0.9999),
    ("models", "market_states_min"): (1, 6),
    ("models", "premium_drift_floor"): (0.0, 1.0),
    ("models", "market_states_max"): (1, 6),
}


def _warning_thresholds_type():
    try:
        from tracker.estimation.warning_rules import WarningThresholds
    except ImportError:  # pragma: no cover - the warnings module is part of the package
        return None
    return WarningThresholds


@dataclass(frozen=True)
class Config:
    store: StoreSettings = field(default_factory=StoreSettings)
    ingest: IngestSettings = field(default_factory=IngestSettings)
    models: ModelSettings = field(default_factory=ModelSettings)
    assets: AssetSettings = field(default_factory=AssetSettings)
    ui: UISettings = field(default_factory=UISettings)
    service: ServiceSettings = field(default_factory=ServiceSettings)
    warnings: Any = None            # WarningThresholds, filled in by load_config

    def inbox_path(self, store_folder: Path) -> Path:
        return (store_folder / self.store.inbox).resolve()


def _coerce(section: str, key: str, value: Any, default: Any) -> Any:
    name = f"[{section}] {key}"
    if isinstance(default, bool):
        if not isinstance(value, bool):
            raise ConfigError(f"{name} must be true or false, got {value!r}")
    elif isinstance(default, int):
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"{name} must be a whole number, got {value!r}")
    elif isinstance(default, float):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"{name} must be a number, got {value!r}")
        value = float(value)
        if value != value:
            raise ConfigError(f"{name} must be a number, got nan")
    elif isinstance(default, str):
        if not isinstance(value, str) or not value:
            raise ConfigError(f"{name} must be a non-empty string, got {value!r}")
    choices = _CHOICES.get((section, key))
    if choices is not None and value not in choices:
        raise ConfigError(f"{name} must be one of {', '.join(map(repr, choices))}, got {value!r}")
    bounds = _RANGES.get((section, key))
    if bounds is not None and not (bounds[0] <= value <= bounds[1]):
        raise ConfigError(f"{name} must be between {bounds[0]} and {bounds[1]}, got {value!r}")
    if (section != "warnings" and bounds is None and isinstance(value, (int, float))
            and not isinstance(value, bool) and value <= 0 and key != "seed"):
        raise ConfigError(f"{name} must be positive, got {value!r}")
    return value


def _build(section: str, cls: type, raw: Any) -> Any:
    if not isinstance(raw, dict):
        raise ConfigError(f"[{section}] must be a table of keys")
    defaults = cls()
    known = {f.name for f in dataclasses.fields(cls)}
    values = {}
    for key, value in raw.items():
        if key not in known:
            raise ConfigError(f"unknown key [{section}] {key}; known keys: {', '.join(sorted(known))}")
        values[key] = _coerce(section, key, value, getattr(defaults, key))
    try:
        return dataclasses.replace(defaults, **values)
    except ValueError as exc:  # the section's own checks (e.g. WarningThresholds)
        raise ConfigError(str(exc).replace(f"{section}.", f"[{section}] ", 1)) from None


def config_from_dict(raw: dict[str, Any]) -> Config:
    sections: dict[str, type] = {
        "store": StoreSettings,
        "ingest": IngestSettings,
        "models": ModelSettings,
        "assets": AssetSettings,
        "ui": UISettings,
        "service": ServiceSettings,
    }
    thresholds_cls = _warning_thresholds_type()
    if thresholds_cls is not None:
        sections["warnings"] = thresholds_cls
    built: dict[str, Any] = {}
    for section, value in raw.items():
        if section not in sections:
            raise ConfigError(f"unknown section [{section}]; known sections: {', '.join(sorted(sections))}")
        built[section] = _build(section, sections[section], value)
    if "warnings" not in built and thresholds_cls is not None:
        built["warnings"] = thresholds_cls()
    cfg = Config(**built)
    if cfg.models.market_states_min > cfg.models.market_states_max:
        raise ConfigError("[models] market_states_min must not exceed market_states_max")
    return cfg


def load_config(store_folder: Path) -> Config:
    """Read ``tracker.toml`` from the store's folder; defaults where it is absent."""
    path = store_folder / CONFIG_NAME
    if not path.exists():
        return config_from_dict({})
    try:
        raw = tomllib.loads(path.read_text("utf-8"))
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{path} is not UTF-8 text") from exc
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: invalid TOML ({exc})") from exc
    try:
        return config_from_dict(raw)
    except ConfigError as exc:
        raise ConfigError(f"{path}: {exc}") from None


def default_config_text() -> str:
    """The file written beside a new store: every key with its default value."""
    cfg = config_from_dict({})
    lines = [
        "# Configuration of this store. Every key below shows its default; see README.md,",
        "# section 'Configuration', for what each one does. Delete a key to use the default.",
        "",
    ]
    for section in ("store", "ingest", "models", "assets", "ui", "service", "warnings"):
        obj = getattr(cfg, section)
        if obj is None:
            continue
        lines.append(f"[{section}]")
        for f in dataclasses.fields(obj):
            lines.append(f"{f.name} = {_toml_value(getattr(obj, f.name))}")
        lines.append("")
    return "\n".join(lines)


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    return repr(v)
