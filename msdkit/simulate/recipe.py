"""Scene recipes: validated YAML descriptions of a synthetic movie (camera, optics, sample, particles).

A recipe names everything needed to render a movie with known truth; :mod:`msdkit.simulate.scene` renders
it. Unknown keys are rejected with the nearest valid key, as in the run config.

Example (``synthetic_movies/demo_beads_100nm.yaml``)::

    name: demo_beads_100nm
    seed: 1
    width_px: 256
    height_px: 256
    pixel_size_um: 0.166
    n_frames: 200
    frame_interval_s: 0.0333333
    exposure_s: 0.015
    temperature_c: 25.0
    medium: water
    optics: {n_dims: 3, wavelength_nm: 520, numerical_aperture: 1.2, focal_depth_um: 1.0, slab_um: 4.0}
    camera: {background_photons: 20, read_noise_electrons: 1.5, offset_adu: 100}
    populations:
      - {label: beads, count_in_view: 50, diameter_nm: 100, photons: 1500, motion: brownian}
"""

from __future__ import annotations

import difflib
from pathlib import Path
from typing import Annotated, Any, Literal

import numpy as np
import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from ..errors import ConfigError
from ..hydro import stokes_einstein_D_um2_s, water_viscosity_mpa_s
from .optics import psf_sigma_um

_STRICT = ConfigDict(extra="forbid", frozen=True)
Positive = Annotated[float, Field(gt=0)]


class BrownianMotion(BaseModel):
    """Free diffusion; D from Stokes–Einstein for each particle's diameter unless ``D_um2_s`` is given."""

    model_config = _STRICT
    model: Literal["brownian"] = "brownian"
    D_um2_s: Positive | None = None


class DirectedMotion(BaseModel):
    """Diffusion plus a constant velocity of ``speed_um_s`` in a random direction in the image plane."""

    model_config = _STRICT
    model: Literal["directed"]
    speed_um_s: Positive
    D_um2_s: Positive | None = None


class ConfinedMotion(BaseModel):
    """Diffusion reflected inside a square (2D) or cube (3D) of side ``box_um`` around a fixed centre."""

    model_config = _STRICT
    model: Literal["confined"]
    box_um: Positive
    D_um2_s: Positive | None = None


class FractionalMotion(BaseModel):
    """Fractional Brownian motion, MSD per axis 2 K t^alpha (Mandelbrot & Van Ness 1968)."""

    model_config = _STRICT
    model: Literal["fbm"]
    alpha: Annotated[float, Field(gt=0, lt=2)]
    K_um2_s_alpha: Positive


Motion = Annotated[
    BrownianMotion | DirectedMotion | ConfinedMotion | FractionalMotion, Field(discriminator="model")
]


class Population(BaseModel):
    """One kind of particle in the scene."""

    model_config = _STRICT
    label: str = "particles"
    count_in_view: Annotated[float, Field(gt=0)]
    diameter_nm: Positive = 100.0
    diameter_geometric_sd: Annotated[float, Field(ge=1.0, le=5.0)] = 1.0
    photons: Positive = 1000.0
    brightness_exponent: Annotated[float, Field(ge=0, le=8)] = 0.0
    motion: Motion = BrownianMotion()

    @field_validator("motion", mode="before")
    @classmethod
    def _motion_shorthand(cls, v):
        return {"model": v} if isinstance(v, str) else v


class Optics(BaseModel):
    """Point-spread function and focus."""

    model_config = _STRICT
    n_dims: Literal[2, 3] = 3
    wavelength_nm: Positive = 520.0
    numerical_aperture: Annotated[float, Field(gt=0, lt=1.7)] = 1.2
    psf_sigma_um: Positive | None = None
    focal_depth_um: Positive = 1.0
    slab_um: Positive | None = None
    margin_um: Annotated[float, Field(ge=0)] | None = None
    blur_substeps: Annotated[int, Field(ge=1, le=64)] | None = None

    @model_validator(mode="after")
    def _slab_holds_focus(self):
        if self.n_dims == 3 and self.slab_um is not None and self.slab_um < self.focal_depth_um:
            raise ValueError(
                f"slab_um must be >= focal_depth_um; got slab_um={self.slab_um} < focal_depth_um="
                f"{self.focal_depth_um}. Make the simulated slab at least as thick as the focal depth."
            )
        return self

    def sigma_um(self) -> float:
        """In-focus spot SD: ``psf_sigma_um`` if given, else 0.21 lambda / NA."""
        if self.psf_sigma_um is not None:
            return float(self.psf_sigma_um)
        return psf_sigma_um(wavelength_nm=self.wavelength_nm, numerical_aperture=self.numerical_aperture)

    def slab_thickness_um(self) -> float:
        """Thickness of the simulated volume along z (default 4 focal depths)."""
        return float(self.slab_um) if self.slab_um is not None else 4.0 * self.focal_depth_um


class Camera(BaseModel):
    """Background and camera readout; photons are photoelectrons (quantum efficiency folded in)."""

    model_config = _STRICT
    background_photons: Annotated[float, Field(ge=0)] = 10.0
    read_noise_electrons: Annotated[float, Field(ge=0)] = 1.5
    gain_adu_per_electron: Positive = 1.0
    offset_adu: Annotated[float, Field(ge=0, le=60000)] = 100.0


class ViscosityMedium(BaseModel):
    """A medium of fixed viscosity."""

    model_config = _STRICT
    viscosity_mpa_s: Positive


class SceneRecipe(BaseModel):
    """Everything needed to render a synthetic movie with known truth."""

    model_config = _STRICT
    name: str = "scene"
    description: str = ""
    seed: int = 0
    width_px: Annotated[int, Field(ge=8, le=8192)] = 256
    height_px: Annotated[int, Field(ge=8, le=8192)] = 256
    pixel_size_um: Positive = 0.166
    n_frames: Annotated[int, Field(ge=2, le=1_000_000)] = 200
    frame_interval_s: Positive = 1.0 / 30.0
    exposure_s: Annotated[float, Field(ge=0)] = 0.015
    temperature_c: Annotated[float, Field(gt=-20, lt=110)] = 25.0
    medium: Literal["water"] | ViscosityMedium = "water"
    drift_um_s: tuple[float, float] = (0.0, 0.0)
    optics: Optics = Optics()
    camera: Camera = Camera()
    populations: Annotated[list[Population], Field(min_length=1)]

    @field_validator("name")
    @classmethod
    def _plain_name(cls, v: str):
        bad = set('/\\:*?"<>|') & set(v)
        if not v.strip() or bad:
            raise ValueError(
                f"name must be a plain file name; got {v!r}. Use letters, digits, '_' or '-' "
                "(it names the files)."
            )
        return v

    @model_validator(mode="after")
    def _exposure_fits_frame(self):
        if self.exposure_s > self.frame_interval_s * (1 + 1e-9):
            raise ValueError(
                f"exposure_s must be <= frame_interval_s; got exposure_s={self.exposure_s} > "
                f"frame_interval_s="
                f"{self.frame_interval_s}. The shutter cannot stay open longer than a frame."
            )
        return self

    def viscosity_mpa_s(self) -> float:
        """Medium viscosity at the recipe's temperature (water: Pátek et al. 2009 via msdkit.hydro)."""
        if self.medium == "water":
            return float(water_viscosity_mpa_s(self.temperature_c))
        return float(self.medium.viscosity_mpa_s)

    def diffusion_um2_s(self, diameter_nm, motion, *, viscosity_mpa_s: float | None = None) -> Any:
        """D of particles of the given diameter under ``motion`` (Stokes–Einstein unless D is fixed)."""
        fixed = getattr(motion, "D_um2_s", None)
        if fixed is not None:
            return fixed + 0.0 * np.asarray(diameter_nm, float)
        eta = self.viscosity_mpa_s() if viscosity_mpa_s is None else viscosity_mpa_s
        return stokes_einstein_D_um2_s(
            0.5 * np.asarray(diameter_nm, float), temperature_c=self.temperature_c, viscosity_mpa_s=eta
        )


_NESTED: dict[str, type[BaseModel]] = {"optics": Optics, "camera": Camera, "populations": Population}
_MOTIONS: tuple[type[BaseModel], ...] = (BrownianMotion, DirectedMotion, ConfinedMotion, FractionalMotion)


def _keys(model: type[BaseModel]) -> list[str]:
    return list(model.model_fields)


def _model_at(loc: tuple) -> list[type[BaseModel]]:
    """Return the recipe model(s) that hold the key at ``loc`` (several for the motion union)."""
    parts = [p for p in loc[:-1] if isinstance(p, str)]
    if not parts:
        return [SceneRecipe]
    if parts[0] in _NESTED and len(parts) == 1:
        return [_NESTED[parts[0]]]
    if parts[0] == "populations" and len(parts) >= 2 and parts[1] == "motion":
        return list(_MOTIONS)
    if parts[0] == "medium":
        return [ViscosityMedium]
    return []


def _format(exc: ValidationError, source: str) -> str:
    lines = []
    for err in exc.errors():
        loc = tuple(err["loc"])
        key_path = ".".join(str(p) for p in loc) or "(top level)"
        if err["type"] == "extra_forbidden":
            valid = sorted({k for m in _model_at(loc) for k in _keys(m)})
            near = difflib.get_close_matches(str(loc[-1]), valid, n=1, cutoff=0.5)
            hint = (
                f" (did you mean '{near[0]}'?)"
                if near
                else (f" (valid keys: {', '.join(valid)})" if valid else "")
            )
            lines.append(f"{source}: {key_path}: unknown key{hint}")
        elif err["type"] == "missing":
            lines.append(f"{source}: {key_path}: required key is missing")
        elif err["type"] == "union_tag_invalid":
            lines.append(
                f"{source}: {key_path}: motion model must be one of brownian, directed, confined, fbm; "
                f"got {err.get('input')!r}"
            )
        else:
            lines.append(f"{source}: {key_path}: {err['msg']}; got {err.get('input')!r}")
    return "\n".join(dict.fromkeys(lines))


def recipe_from_dict(data: dict, *, source: str = "<recipe>", name: str | None = None) -> SceneRecipe:
    """Validate a recipe given as a dict; ``name`` is used when the dict has none.

    Raises
    ------
    ConfigError
        Naming the source, the key path and (for unknown keys) the nearest valid key.
    """
    if not isinstance(data, dict):
        raise ConfigError(
            f"{source}: a scene recipe must be a mapping of keys to values; got {type(data).__name__}."
        )
    if name is not None and "name" not in data:
        data = {**data, "name": name}
    try:
        return SceneRecipe(**data)
    except ValidationError as exc:
        raise ConfigError(_format(exc, source)) from None


def load_recipe(path: str | Path) -> SceneRecipe:
    """Load and validate a scene recipe from YAML; the name defaults to the file stem.

    Raises
    ------
    ConfigError
        When the file is missing, not YAML, or has unknown keys or out-of-range values.
    """
    p = Path(path)
    if not p.is_file():
        raise ConfigError(
            f"{p}: scene recipe not found. Give the path of a YAML recipe (see synthetic_movies/demo_*.yaml)."
        )
    try:
        data = yaml.safe_load(p.read_text(encoding="utf-8"))
    except yaml.YAMLError as exc:
        raise ConfigError(f"{p}: not valid YAML: {exc}") from None
    return recipe_from_dict(data or {}, source=str(p), name=p.name.removesuffix(".yaml").removesuffix(".yml"))
