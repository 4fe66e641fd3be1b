"""The shoreline shipped inside the package, so that maps draw on a machine that was never online.

The data are the coarse, level-1 (land/ocean) shorelines of GSHHG, as carried by Debian's
``python-cartopy-data`` package, LGPL-3 licensed; the licence and the data's own README travel with
them in ``data/shoreline/``.
"""

from __future__ import annotations

import functools
import logging
from pathlib import Path

import numpy as np

DATA_DIR = Path(__file__).resolve().parent / "data" / "shoreline"
SHAPEFILE = DATA_DIR / "shapefiles" / "gshhs" / "c" / "GSHHS_c_L1.shp"
# two rings of the coarse set are stored as holes only; the reader says so on every read
logging.getLogger("shapefile").setLevel(logging.ERROR)


def configure_cartopy() -> None:
    """Point cartopy's offline data directory at the shipped shoreline (for GSHHSFeature)."""
    import cartopy

    cartopy.config["pre_existing_data_dir"] = str(DATA_DIR)


@functools.lru_cache(maxsize=1)
def shoreline_polygons():
    """List of shapely polygons (lon/lat degrees) of the coarse shoreline."""
    from cartopy.io.shapereader import Reader

    polys = []
    for geom in Reader(str(SHAPEFILE)).geometries():
        polys.extend(getattr(geom, "geoms", [geom]))
    return polys


def shoreline_paths(crs=None) -> list[np.ndarray]:
    """Exterior rings as (n, 2) arrays, projected to ``crs`` (a cartopy CRS) when given."""
    import cartopy.crs as ccrs

    src = ccrs.PlateCarree()
    out = []
    for poly in shoreline_polygons():
        xy = np.asarray(poly.exterior.coords)
        if crs is not None:
            p = crs.transform_points(src, xy[:, 0], xy[:, 1])[:, :2]
            # split rings where the projection wraps (antimeridian), so no line crosses the map
            jump = np.abs(np.diff(p[:, 0])) > 0.5 * (crs.x_limits[1] - crs.x_limits[0])
            for piece in np.split(p, np.flatnonzero(jump) + 1):
                if len(piece) > 1 and np.all(np.isfinite(piece)):
                    out.append(piece)
        else:
            out.append(xy)
    return out
