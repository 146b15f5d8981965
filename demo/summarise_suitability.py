#!/usr/bin/python3
"""Short summary of the demo's temperature-suitability layers (invented Lower Tamsin district):
suitable months of the synoptic cycle from the lowland south to the highland north, and the
caution that goes with them."""
import argparse
import os

import numpy as np
from osgeo import gdal

gdal.UseExceptions()

CAUTION = ("Caution: temperature suitability describes temperature alone - not malaria risk, "
           "incidence or a case forecast; land-surface temperature is not air temperature; "
           "decisions belong with national programme data, entomological surveillance and "
           "local expertise.")


def read(path):
    ds = gdal.Open(path)
    return ds.ReadAsArray().astype(np.float64), [ds.GetRasterBand(b + 1).GetDescription()
                                                 for b in range(ds.RasterCount)]


def main():
    p = argparse.ArgumentParser()
    p.add_argument("--suitability", required=True)
    p.add_argument("--name", default="r0-2013")
    a = p.parse_args()
    summary, names = read(os.path.join(a.suitability, a.name + "_summary_synoptic.tif"))
    synoptic, months = read(os.path.join(a.suitability, a.name + "_synoptic.tif"))
    count = summary[names.index("suitable_months")]
    run = summary[names.index("longest_suitable_run")]
    h = count.shape[0]
    print("Temperature suitability (%s, synoptic cycle) - invented Lower Tamsin district" % a.name)
    for label, rows in (("north (highlands)", slice(0, h // 3)), ("centre", slice(h // 3, 2 * h // 3)),
                        ("south (lowlands)", slice(2 * h // 3, h))):
        c, r = count[rows], run[rows]
        print("  %-18s suitable months: median %4.1f (range %2.0f-%2.0f); longest run median %4.1f"
              % (label, np.nanmedian(c), np.nanmin(c), np.nanmax(c), np.nanmedian(r)))
    monthly = np.nanmean(synoptic.reshape(synoptic.shape[0], -1), axis=1)
    print("  district mean relative suitability by month: " +
          " ".join("%s %.2f" % (m.split()[-1], v) for m, v in zip(months, monthly)))
    print("  layers in %s" % a.suitability)
    print(CAUTION)


if __name__ == "__main__":
    main()
