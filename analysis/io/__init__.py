"""Stage 1, reading and writing: fixes from CSV, Parquet, CF trajectory netCDF, DataFrames and Datasets;
result tables with their units."""

from .fixes import FixReader, fixes_to_cf_dataset, read_fixes, write_fixes
from .tables import read_table, write_table

__all__ = ["FixReader", "fixes_to_cf_dataset", "read_fixes", "read_table", "write_fixes", "write_table"]
