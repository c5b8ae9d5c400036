"""msdkit: diffusion coefficients, hydrodynamic sizes and motion verdicts from single-particle tracking.

The public API is imported lazily so that ``import msdkit`` stays cheap.
"""

from __future__ import annotations

import importlib

from ._version import __version__

_API = {
    "load_config": "msdkit.config",
    "config_from_dict": "msdkit.config",
    "run_batch": "msdkit.batch",
    "analyze_tracks": "msdkit.pipeline",
    "process_input": "msdkit.pipeline",
    "time_averaged_msd": "msdkit.msd",
    "ensemble_msd": "msdkit.msd",
    "fit_tracks": "msdkit.fit",
    "fit_sample": "msdkit.fit",
    "classify_tracks": "msdkit.classify",
    "estimate_drift": "msdkit.drift",
    "remove_drift": "msdkit.drift",
    "water_viscosity_mpa_s": "msdkit.hydro",
    "medium_viscosity_mpa_s": "msdkit.hydro",
    "stokes_einstein_radius_nm": "msdkit.hydro",
    "stokes_einstein_D_um2_s": "msdkit.hydro",
    "stokes_einstein_size": "msdkit.hydro",
    "size_distribution": "msdkit.sizing",
    "lag1_track_estimates": "msdkit.sizing",
    "track_sizes_nm": "msdkit.sizing",
    "read_track_table": "msdkit.io.tables",
    "open_stack": "msdkit.io.stacks",
    "locate_spots": "msdkit.detect",
    "link_spots": "msdkit.link",
}

__all__ = ["__version__", *_API]


def __getattr__(name: str):
    if name in _API:
        return getattr(importlib.import_module(_API[name]), name)
    raise AttributeError(f"module 'msdkit' has no attribute {name!r}")
