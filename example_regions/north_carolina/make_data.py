"""Write nc_counties.gpkg from the North Carolina SIDS data bundled with libpysal.

Source: Cressie, N. (1993) Statistics for Spatial Data, Wiley, pp. 386-389; the
sudden infant death (SIDS) counts of Cressie & Chan (1989), 100 counties,
1974-78 and 1979-84. libpysal ships them as ``sids2.shp``
(``libpysal.examples.get_path("sids2.shp")``). We keep the 1974-78 columns.

Run ``python make_data.py [OUTPUT_DIR]`` (default: this folder).
"""
from __future__ import annotations

import sys
from pathlib import Path

import geopandas as gpd
import libpysal

KEEP = ["FIPS", "NAME", "SID74", "BIR74", "NWBIR74"]
COUNTS = ["SID74", "BIR74", "NWBIR74"]
# The shapefile has no .prj; its metadata says "unprojected, lat-lon" without a datum.
# NAD27 is, from memory, the datum usually declared for these boundaries; the choice
# moves nothing by more than tens of metres and does not change contiguity.
CRS = "EPSG:4267"


def north_carolina_counties() -> gpd.GeoDataFrame:
    """The 100 counties with 1974-78 SIDS deaths, live births and non-white births."""
    source = gpd.read_file(libpysal.examples.get_path("sids2.shp"))
    counties = source[KEEP + ["geometry"]].copy()
    counties[COUNTS] = counties[COUNTS].round().astype("int64")   # stored as floats in the .dbf
    counties["nonwhite_birth_share"] = (counties["NWBIR74"] / counties["BIR74"]).round(6)
    return counties.set_crs(CRS)


def main(output_dir: Path) -> None:
    counties = north_carolina_counties()
    counties.to_file(output_dir / "nc_counties.gpkg", layer="counties", driver="GPKG")
    print(f"{len(counties)} counties, SID74 {counties['SID74'].sum():,}, "
          f"BIR74 {counties['BIR74'].sum():,}, NWBIR74 {counties['NWBIR74'].sum():,}")


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).resolve().parent)
