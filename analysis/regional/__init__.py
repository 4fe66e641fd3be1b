"""Stage 7, regional products: gridded parameter maps, observed single-particle dispersion."""

from .dispersion import DispersionResult, model_diffusivity, single_particle_dispersion
from .maps import default_params, file_digest, grid_fits, grid_fits_file

__all__ = ["DispersionResult", "default_params", "file_digest", "grid_fits", "grid_fits_file", "model_diffusivity",
           "single_particle_dispersion"]
