"""Validated configuration: one pydantic model per section, unknown keys rejected with a near match.

Keys marked *fixed* in the design are a contract: ``inputs``, ``output_dir``, ``acquisition.pixel_size_um``,
``acquisition.frame_interval_s``, ``acquisition.exposure_s``, ``sample.temperature_c``, ``sample.medium``,
``executor``. Every other section has working automatic defaults.
"""

from __future__ import annotations

import difflib
import glob
import hashlib
import json
from pathlib import Path
from typing import Annotated, Any, Literal

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from .errors import ConfigError

_STRICT = ConfigDict(extra="forbid", frozen=True)


class AcquisitionConfig(BaseModel):
    """Camera and timing. Values omitted here may come from OME-TIFF metadata."""

    model_config = _STRICT
    pixel_size_um: Annotated[float, Field(gt=0)] | None = None
    frame_interval_s: Annotated[float, Field(gt=0)] | None = None
    exposure_s: Annotated[float, Field(ge=0)] | None = None  # None: same as frame_interval_s
    channel: Annotated[int, Field(ge=0)] | None = None  # which channel of a multichannel movie to track

    @model_validator(mode="after")
    def _exposure_fits_frame(self):
        if (
            self.exposure_s is not None
            and self.frame_interval_s is not None
            and self.exposure_s > self.frame_interval_s * (1 + 1e-9)
        ):
            raise ValueError(
                f"exposure_s must be <= frame_interval_s; got exposure_s={self.exposure_s} > "
                f"frame_interval_s={self.frame_interval_s}. The shutter cannot stay open longer than a frame."
            )
        return self


class MediumViscosity(BaseModel):
    """A medium given by a fixed viscosity (the same at every temperature)."""

    model_config = _STRICT
    viscosity_mpa_s: Annotated[float, Field(gt=0)]


class MediumViscosityTable(BaseModel):
    """A medium given by a table of temperature → viscosity; ln η is interpolated linearly in 1/T."""

    model_config = _STRICT
    temperature_c: Annotated[list[Annotated[float, Field(gt=-30, lt=150)]], Field(min_length=1)]
    viscosity_mpa_s: Annotated[list[Annotated[float, Field(gt=0)]], Field(min_length=1)]

    @model_validator(mode="after")
    def _same_length(self):
        if len(self.temperature_c) != len(self.viscosity_mpa_s):
            raise ValueError(
                f"the viscosity table needs one viscosity per temperature; got {len(self.temperature_c)} "
                f"temperatures and {len(self.viscosity_mpa_s)} viscosities. Make the two lists equally long."
            )
        if len(set(self.temperature_c)) != len(self.temperature_c):
            raise ValueError(f"the viscosity table's temperatures must all differ; got {self.temperature_c}.")
        return self


class GlycerolByMass(BaseModel):
    """Glycerol–water mixture given by the mass fraction of glycerol (0–1); Cheng (2008) viscosity."""

    model_config = _STRICT
    glycerol_mass_fraction: Annotated[float, Field(ge=0, le=1)]


class GlycerolByVolume(BaseModel):
    """Glycerol–water mixture given by the volume fraction of glycerol (0–1, volumes before mixing, 20 °C)."""

    model_config = _STRICT
    glycerol_volume_fraction: Annotated[float, Field(ge=0, le=1)]


class BeadCalibratedMedium(BaseModel):
    """An unknown medium calibrated with beads of known diameter.

    The beads' D must be measured in the medium at the sample temperature; η = k_B T / (3 π d_ref D_ref).
    """

    model_config = _STRICT
    reference_diameter_nm: Annotated[float, Field(gt=0)]
    reference_D_um2_s: Annotated[float, Field(gt=0)]


#: Named media (``medium: water``) and their accepted spellings.
MEDIUM_NAMES = ("water", "heavy_water", "saline", "pbs")
_MEDIUM_ALIASES = {
    "h2o": "water", "d2o": "heavy_water", "heavy water": "heavy_water", "heavy-water": "heavy_water",
}
_MEDIUM_MODELS: tuple[type[BaseModel], ...] = (
    MediumViscosity, MediumViscosityTable, GlycerolByMass, GlycerolByVolume, BeadCalibratedMedium,
)
MediumModel = (
    MediumViscosity | MediumViscosityTable | GlycerolByMass | GlycerolByVolume | BeadCalibratedMedium
)
_MEDIUM_FORMS_TEXT = (
    "water | heavy_water | saline | pbs | {viscosity_mpa_s: 3.0} | {glycerol_mass_fraction: 0.4} | "
    "{glycerol_volume_fraction: 0.4} | {temperature_c: [20, 30], viscosity_mpa_s: [1.2, 0.9]} | "
    "{reference_diameter_nm: 100, reference_D_um2_s: 4.3}"
)


def _parse_medium(value: Any) -> Any:
    """Turn a YAML medium (name or mapping) into a canonical name or a validated medium model."""
    if isinstance(value, BaseModel):
        return value
    if isinstance(value, str):
        key = value.strip().lower()
        key = _MEDIUM_ALIASES.get(key, key)
        if key in MEDIUM_NAMES:
            return key
        near = difflib.get_close_matches(key, [*MEDIUM_NAMES, *_MEDIUM_ALIASES], n=1, cutoff=0.5)
        hint = f" (did you mean '{_MEDIUM_ALIASES.get(near[0], near[0])}'?)" if near else ""
        raise ValueError(f"unknown medium {value!r}{hint}. Valid media: {_MEDIUM_FORMS_TEXT}")
    if isinstance(value, dict):
        keys = set(value)
        for model in _MEDIUM_MODELS:
            if keys == set(model.model_fields):
                try:
                    return model(**value)
                except ValidationError as exc:
                    parts = []
                    for e in exc.errors():
                        msg = str(e["msg"]).removeprefix("Value error, ")
                        where = ".".join(str(p) for p in e["loc"])
                        parts.append(f"{where}: {msg}" if where else msg)
                    raise ValueError("; ".join(parts)) from None
        all_keys = sorted({k for m in _MEDIUM_MODELS for k in m.model_fields})
        unknown = sorted(keys - set(all_keys))
        if unknown:
            near = difflib.get_close_matches(unknown[0], all_keys, n=1, cutoff=0.5)
            hint = f" (did you mean '{near[0]}'?)" if near else ""
            raise ValueError(f"unknown medium key '{unknown[0]}'{hint}. Valid media: {_MEDIUM_FORMS_TEXT}")
        raise ValueError(f"the keys {sorted(keys)} do not make one medium. Valid media: {_MEDIUM_FORMS_TEXT}")
    raise ValueError(
        f"a medium is a name or a mapping; got {type(value).__name__}. Valid media: {_MEDIUM_FORMS_TEXT}"
    )


class SampleConfig(BaseModel):
    """The sample's physical conditions."""

    model_config = _STRICT
    temperature_c: Annotated[float, Field(gt=-30, lt=150)] = 25.0
    temperature_sd_c: Annotated[float, Field(ge=0)] = 0.0
    medium: Literal["water", "heavy_water", "saline", "pbs"] | MediumModel = "water"
    wall_distance_um: Annotated[float, Field(gt=0)] | None = None

    @field_validator("medium", mode="before")
    @classmethod
    def _medium_form(cls, v):
        return _parse_medium(v)

    @model_validator(mode="after")
    def _medium_covers_temperature(self):
        from .hydro import medium_viscosity_mpa_s

        try:
            medium_viscosity_mpa_s(self.medium, self.temperature_c)
        except ValueError as exc:
            raise ValueError(f"medium and temperature_c do not fit: {exc}") from None
        return self


class DetectionConfig(BaseModel):
    """Spot finding. Every setting is 'auto' (None) unless given."""

    model_config = _STRICT
    spot_diameter_px: Annotated[float, Field(gt=1, le=99)] | None = None  # FWHM of an in-focus spot
    min_mass: Annotated[float, Field(ge=0)] | None = None  # camera counts (matched-filter brightness)
    false_spots_per_frame: Annotated[float, Field(gt=0, le=100)] = 0.01  # target for the auto min_mass
    max_precision_px: Annotated[float, Field(gt=0)] | None = None  # auto: the spot SD
    max_sigma_px: Annotated[float, Field(gt=0)] | None = None  # auto: 4 x the spot SD (far out of focus)
    chunk_frames: Annotated[int, Field(ge=1)] = 200


class LinkingConfig(BaseModel):
    """Joining spots into tracks."""

    model_config = _STRICT
    max_step_px: Annotated[float, Field(gt=0)] | None = None
    max_gap_frames: Annotated[int, Field(ge=0, le=20)] = 2
    min_track_points: Annotated[int, Field(ge=2)] = 10
    # joining radius of an isolated pair in step SDs (auto: msdkit.link.automatic_acceptance_sd)
    acceptance_sd: Annotated[float, Field(ge=2, le=8)] | None = None


class AnalysisConfig(BaseModel):
    """MSD, fits and motion verdicts."""

    model_config = _STRICT
    n_dims: Literal[1, 2] = 2
    estimator: Literal["auto", "covariance", "msd_fit", "likelihood"] = "auto"
    max_lag_frames: Annotated[int, Field(ge=1)] | None = None
    drift_correction: bool = True
    min_track_points: Annotated[int, Field(ge=2)] | None = None
    # shortest tracks used for the size distribution (movies: linked down to this length; its kernel takes
    # each track's own number of steps, and short tracks are mostly the small, fast particles)
    size_min_track_points: Annotated[int, Field(ge=2)] = 2
    # shortest tracks pooled into the sample D of a movie (at least 3: the covariance-based estimator needs
    # two steps); the long-track filter linking.min_track_points keeps the slow, sharp particles that stayed
    # in focus and the tracks lengthened by wrong joins, so pooling the short ones too is less biased
    sample_min_track_points: Annotated[int, Field(ge=3)] = 3
    seed: int = 0


class ExecutorConfig(BaseModel):
    """Where the batch runs."""

    model_config = _STRICT
    kind: Literal["local", "serial", "dask"] = "local"
    n_workers: Annotated[int, Field(ge=1)] | None = None
    address: str | None = None


class Config(BaseModel):
    """A whole run: inputs, outputs, acquisition, sample and stage settings."""

    model_config = _STRICT
    inputs: list[str]
    output_dir: str = "results"
    acquisition: AcquisitionConfig = AcquisitionConfig()
    sample: SampleConfig = SampleConfig()
    detection: DetectionConfig = DetectionConfig()
    linking: LinkingConfig = LinkingConfig()
    analysis: AnalysisConfig = AnalysisConfig()
    executor: ExecutorConfig = ExecutorConfig()
    # Folder the config file lives in; relative paths resolve against it. Not a YAML key.
    base_dir: str = Field(default=".", exclude=True)
    source: str = Field(default="<config>", exclude=True)

    @field_validator("inputs", mode="before")
    @classmethod
    def _inputs_list(cls, v):
        if isinstance(v, str):
            v = [v]
        if not v:
            raise ValueError("inputs must list at least one file or glob; got an empty list.")
        return v

    def resolve_path(self, path: str) -> Path:
        """Resolve a path from the config against the config file's folder."""
        p = Path(path).expanduser()
        return p if p.is_absolute() else Path(self.base_dir) / p

    def input_paths(self) -> list[Path]:
        """Expand the input globs (sorted, duplicates removed) against the config folder."""
        seen: dict[str, Path] = {}
        for pattern in self.inputs:
            full = self.resolve_path(pattern)
            matches = (sorted(glob.glob(str(full), recursive=True)) if glob.has_magic(str(full))
                       else [str(full)])
            for m in matches:
                seen.setdefault(str(Path(m).resolve()), Path(m))
        return list(seen.values())

    def output_path(self) -> Path:
        """Return the output folder, resolved against the config folder."""
        return self.resolve_path(self.output_dir)


def _all_keys(model: type[BaseModel]) -> list[str]:
    return [k for k, f in model.model_fields.items() if not f.exclude]


def _model_at(loc: tuple) -> type[BaseModel] | None:
    model: type[BaseModel] | None = Config
    for part in loc[:-1]:
        if model is None or not isinstance(part, str) or part not in model.model_fields:
            return None
        ann = model.model_fields[part].annotation
        model = ann if isinstance(ann, type) and issubclass(ann, BaseModel) else None
    return model


def _format_errors(exc: ValidationError, source: str) -> str:
    lines = []
    for err in exc.errors():
        loc = tuple(p for p in err["loc"]
                    if not (isinstance(p, str) and ("[" in p or p.startswith("function"))))
        # pydantic reports union branches; keep names of real keys only
        key_path = ".".join(str(p) for p in loc) or "(top level)"
        if err["type"] == "extra_forbidden":
            model = _model_at(loc)
            hint = ""
            if model is not None:
                near = difflib.get_close_matches(str(loc[-1]), _all_keys(model), n=1, cutoff=0.5)
                hint = (f" (did you mean '{near[0]}'?)" if near
                        else f" (valid keys: {', '.join(_all_keys(model))})")
            lines.append(f"{source}: {key_path}: unknown key{hint}")
        elif err["type"] == "missing":
            lines.append(f"{source}: {key_path}: required key is missing")
        else:
            lines.append(f"{source}: {key_path}: {err['msg']}; got {err.get('input')!r}")
    return "\n".join(dict.fromkeys(lines))


def config_from_dict(data: dict, *, base_dir: str | Path = ".", source: str = "<config>") -> Config:
    """Validate a config given as a dict (as parsed from YAML)."""
    if not isinstance(data, dict):
        raise ConfigError(
            f"{source}: the config must be a mapping of keys to values; got {type(data).__name__}.")
    try:
        return Config(**data, base_dir=str(base_dir), source=str(source))
    except ValidationError as exc:
        raise ConfigError(_format_errors(exc, str(source))) from None


def load_config(path: str | Path) -> Config:
    """Load and validate a YAML config file.

    Raises
    ------
    ConfigError
        When the file is missing, is not valid YAML, or has unknown keys, wrong types or out-of-range values;
        the message names the file and the key path.
    """
    p = Path(path)
    if not p.is_file():
        raise ConfigError(
            f"{p}: config file not found. Give the path of a YAML file (see configs/demo.yaml).")
    try:
        data = yaml.safe_load(p.read_text(encoding="utf-8"))
    except yaml.YAMLError as exc:
        raise ConfigError(f"{p}: not valid YAML: {exc}") from None
    return config_from_dict(data or {}, base_dir=p.resolve().parent, source=str(p))


def config_hash(cfg: Config) -> str:
    """SHA-256 of the settings that change results (not output_dir or executor), for provenance and resume."""
    data = cfg.model_dump(mode="json", exclude={"output_dir", "executor"})
    blob = json.dumps(data, sort_keys=True, default=str).encode()
    return hashlib.sha256(blob).hexdigest()
