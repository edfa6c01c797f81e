"""The configuration model; its field constraints are the constraint table.

See docs/conventions.md items 3 and 13.

Every section is a frozen pydantic model with ``extra="forbid"``, so a misspelt key fails loudly
at load time with the key's name. The defaults live here, in the field declarations; the
repository's ``config/magfuse.toml`` is the annotated copy of them that operators start from (a
test keeps the two equal). The module lives inside ``fusion`` so that the importable name cannot
collide with another installed package called ``config``.
"""

from __future__ import annotations

import json
import tomllib
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from stations.errors import ConfigError

__all__ = [
    "DEFAULT_CONFIG_DOC",
    "CensoringConfig",
    "ComputeConfig",
    "EpochConfig",
    "IngestConfig",
    "LearnConfig",
    "MagfuseConfig",
    "NetworkConfig",
    "NightlyConfig",
    "PairConfig",
    "ServiceConfig",
    "StoreConfig",
    "load_config",
]


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class StoreConfig(_Section):
    """Where the store lives and how writers queue."""

    path: Path = Path("magfuse-store")
    lock_timeout_s: float = Field(30.0, ge=0.0)


class IngestConfig(_Section):
    """Validation limits for ingested rows."""

    magnitude_min: float = -3.0
    magnitude_max: float = 10.0


class ComputeConfig(_Section):
    """Station magnitudes from amplitudes (``ingest --compute``, ``compute``; IASPEI formulas)."""

    ml_distance_correction: str = "HB87"
    q_table: str = "GR56-Q"
    mb_lg_gamma_per_km: float | None = Field(None, ge=0.0)
    mb_bb_period_range_s: tuple[float, float] = (0.2, 30.0)
    ms_bb_period_range_s: tuple[float, float] = (2.0, 60.0)
    allow_out_of_domain: bool = False
    use_station_elevation: bool = False
    stations: str = ""


class LearnConfig(_Section):
    """Station-model fitting (docs/estimator.md §3; docs/rolling-fit.md)."""

    magnitude_type: str = "ML"
    half_life_days: float = Field(120.0, gt=0.0)
    window_days: float = Field(360.0, gt=0.0)
    student_t_dof: float = Field(4.0, gt=0.0)
    max_iter: int = Field(100, ge=1)
    tol_bias: float = Field(1e-4, gt=0.0)
    tol_log_sigma: float = Field(1e-3, gt=0.0)
    anchor: Literal["reference_set", "median", "reference_events", "mean_magnitude"] = (
        "reference_set"
    )
    reference_stations: tuple[str, ...] = ()
    reference_events_csv: str = ""
    mean_magnitude: float = 0.0


class PairConfig(_Section):
    """Correlated-pair detection (docs/pairs.md)."""

    min_shared_events: int = Field(30, ge=4)
    fdr_q: float = Field(0.05, gt=0.0, lt=1.0)
    max_rounds: int = Field(3, ge=1)
    shrink_n0: float = Field(20.0, ge=0.0)
    global_test_replicates: int = Field(200, ge=0)


class EpochConfig(_Section):
    """CUSUM station epochs (docs/epochs.md)."""

    enabled: bool = True
    cusum_k: float = Field(0.5, ge=0.0)
    cusum_h: float = Field(8.0, gt=0.0)
    min_events_per_epoch: int = Field(20, ge=1)


class NetworkConfig(_Section):
    """Per-event network estimate (docs/network-magnitude.md)."""

    confidence_level: float = Field(0.68, gt=0.0, lt=1.0)
    robust_min_stations: int = Field(3, ge=2)
    inconsistent_z: float = Field(3.0, gt=0.0)
    outlier_weight: float = Field(0.3, gt=0.0, lt=1.0)


class CensoringConfig(_Section):
    """Use of non-detections (docs/censoring.md): network estimate and station fit."""

    enabled: bool = True
    soft_threshold_sd: float = Field(0.0, ge=0.0)
    min_detection_probability: float = Field(0.01, ge=0.0, lt=1.0)
    estimate_thresholds: bool = True
    threshold_rounds: int = Field(3, ge=1)
    safe_cells_fallback: bool = False


class NightlyConfig(_Section):
    """Unattended nightly run and its adoption policy."""

    inbox: Path = Path("inbox")
    revision_horizon_days: float = Field(7.0, ge=0.0)
    max_weight_share_change: float = Field(0.10, gt=0.0, le=1.0)
    max_bias_change: float = Field(0.10, gt=0.0)
    dry_run_days: float = Field(30.0, gt=0.0)
    dry_run_top: int = Field(10, ge=1)


class ServiceConfig(_Section):
    """The always-on HTTP service (``magfuse serve``; fusion/service)."""

    host: str = "127.0.0.1"
    port: int = Field(8470, ge=1, le=65535)
    anonymous_read_on_loopback: bool = True
    max_body_bytes: int = Field(16 * 2**20, ge=1024)
    page_size: int = Field(100, ge=1, le=10_000)
    recent_events: int = Field(50, ge=1, le=10_000)
    stream_heartbeat_s: float = Field(15.0, gt=0.0)


class MagfuseConfig(_Section):
    """The whole configuration; every section has defaults, so ``MagfuseConfig()`` is valid."""

    store: StoreConfig = StoreConfig()
    ingest: IngestConfig = IngestConfig()
    compute: ComputeConfig = ComputeConfig()
    learn: LearnConfig = LearnConfig()
    pairs: PairConfig = PairConfig()
    epochs: EpochConfig = EpochConfig()
    network: NetworkConfig = NetworkConfig()
    censoring: CensoringConfig = CensoringConfig()
    nightly: NightlyConfig = NightlyConfig()
    service: ServiceConfig = ServiceConfig()


#: Where the annotated default configuration lives in the repository (for messages).
DEFAULT_CONFIG_DOC = "config/magfuse.toml"


def load_config(path: Path | None = None) -> MagfuseConfig:
    """Read and validate a TOML configuration; ``None`` gives the defaults of this module.

    Raises
    ------
    ConfigError
        If the file is missing, is not TOML, or holds an unknown key or invalid value. Values
        must have their declared type: text is never converted to a number or a flag
        (``"30"``, ``"yes"`` are errors); an integer is accepted for a decimal number. The
        message names the file and the first offending key.
    """
    if path is None:
        return MagfuseConfig()
    source = Path(path)
    try:
        text = source.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(
            f"{source}: configuration file not found; pass an existing --config"
        ) from None
    except UnicodeDecodeError as exc:
        raise ConfigError(
            f"{source}: byte {exc.start} is not UTF-8 text; save the configuration as UTF-8 "
            "(TOML files are UTF-8)"
        ) from None
    except OSError as exc:
        raise ConfigError(
            f"{source}: cannot read the configuration ({exc.strerror}); pass a readable file"
        ) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{source}: not valid TOML ({exc}); fix the syntax") from None
    try:
        # Strict validation through JSON: a TOML string is never turned into a number or a
        # flag ("30", "yes" are errors), while an integer where a float is declared (30 for
        # 30.0) and an array where a pair is declared stay accepted.
        return MagfuseConfig.model_validate_json(json.dumps(data, default=str), strict=True)
    except ValidationError as exc:
        err = exc.errors()[0]
        key = ".".join(str(p) for p in err["loc"])
        raise ConfigError(
            f"{source}: key {key!r}: {err['msg']}; "
            f"every key with its default is in {DEFAULT_CONFIG_DOC}"
        ) from None
