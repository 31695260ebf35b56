"""The regularized Kelvinlet kernels: derived in `derive.py`, generated into `_generated.py`, run
through the typed entry points of `backend.py` (numba, or numpy with ``PLIANT_BACKEND=numpy``).

Callers use this package's face: ``from brushes import kernels; kernels.grab_displacement(...)``.
"""
from brushes.kernels.backend import (
    FALLOFFS,
    affine_displacement,
    affine_jacobian,
    affine_magnitude_bound,
    affine_map,
    affine_reach,
    backend_name,
    beta_of,
    center_value,
    grab_displacement,
    grab_jacobian,
    grab_magnitude_bound,
    grab_reach,
    grab_response,
    gradient_bound,
    gradient_envelope,
    handle_profiles,
    handles_displacement,
    numba_module,
    prefer_sleeping_threads,
    radial_bound,
    reach_of,
    scales,
    slide_along_rays,
    turn_about_axis,
)

__all__ = ["FALLOFFS", "affine_displacement", "affine_jacobian", "affine_magnitude_bound", "affine_map",
           "affine_reach", "backend_name", "beta_of", "center_value", "grab_displacement", "grab_jacobian",
           "grab_magnitude_bound", "grab_reach", "grab_response", "gradient_bound", "gradient_envelope",
           "handle_profiles", "handles_displacement", "numba_module",
           "prefer_sleeping_threads", "radial_bound", "reach_of", "scales", "slide_along_rays", "turn_about_axis"]
