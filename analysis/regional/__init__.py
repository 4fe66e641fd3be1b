"""Stage 7, regional products: gridded parameter maps (with axial means of directions and mean diffusivity
tensors), pooled fits, observed single-particle dispersion."""

from .dispersion import DispersionResult, model_diffusivity, single_particle_dispersion
from .maps import anisotropy_summary, axial_mean, default_params, file_digest, grid_fits, grid_fits_file, mean_tensor

__all__ = ["DispersionResult", "anisotropy_summary", "axial_mean", "default_params", "file_digest", "grid_fits",
           "grid_fits_file", "mean_tensor", "model_diffusivity", "single_particle_dispersion"]
