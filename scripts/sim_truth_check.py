"""Compare a scan the simulator made with what the simulator put in (a developer's check).

    .venv/bin/python scripts/sim_truth_check.py SCAN.fits

Prints, per scan: measured TSYS against the simulator's true Tsys (continuum + spillover +
receiver, read from the scan's own site, pointing and the default simulator settings unless
--receiver-k / --spillover-k say otherwise), VFRAME against astropy's SpectralCoord LSRK
transform for every row's DATE-OBS, GLON, GLAT and the site, and the scan product's line
integral against the model line's integral.
"""

from __future__ import annotations

import argparse
import warnings

import numpy as np
from astropy import units as u
from astropy.coordinates import Galactic, SkyCoord, SpectralCoord
from astropy.io import fits
from astropy.time import Time

from spinflip.daemon.sky import coordinates
from spinflip.daemon.sky.hi_line import C_M_S, HI_REST_FREQ_HZ
from spinflip.daemon.sources.galaxy import ModelGalaxy


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("scan")
    p.add_argument("--receiver-k", type=float, default=55.0)
    p.add_argument("--spillover-k", type=float, default=12.0)
    p.add_argument("--dish-m", type=float, default=3.0)
    a = p.parse_args()
    warnings.filterwarnings("ignore", message="No velocity defined on frame")
    with fits.open(a.scan) as h:
        head, rows = h["SINGLE DISH"].header, h["SINGLE DISH"].data
        prod = h["SCAN AVERAGE"].header if "SCAN AVERAGE" in h else {}
    g = ModelGalaxy()
    l, b = float(rows["GLON"][0]), float(rows["GLAT"][0])
    truth = g.continuum_temperature(l, b) + a.spillover_k + a.receiver_k
    dev = rows["TSYS"] / truth - 1
    print(f"TSYS: {len(rows)} rows, {np.nanmin(rows['TSYS']):.2f}..{np.nanmax(rows['TSYS']):.2f} K "
          f"against true {truth:.2f} K: worst {100 * np.nanmax(np.abs(dev)):.2f} %")
    loc = coordinates.site_location(head["SITELAT"], head["SITELONG"], head["SITEELEV"])
    worst = 0.0
    for r in rows:
        t = Time(r["DATE-OBS"], scale="utc")
        target = SkyCoord(l=r["GLON"] * u.deg, b=r["GLAT"] * u.deg, frame=Galactic(),
                          distance=1 * u.kpc, radial_velocity=0 * u.km / u.s,
                          pm_l_cosb=0 * u.mas / u.yr, pm_b=0 * u.mas / u.yr)
        sc = SpectralCoord(HI_REST_FREQ_HZ * u.Hz, observer=loc.get_itrs(t), target=target)
        f = sc.with_observer_stationary_relative_to("lsrk").to_value(u.Hz)
        worst = max(worst, abs(r["VFRAME"] - C_M_S * (HI_REST_FREQ_HZ - f) / HI_REST_FREQ_HZ))
    print(f"VFRAME: worst difference from astropy's LSRK over {len(rows)} rows {worst:.4f} m/s")
    if "LINEINT" in prod:
        v = np.linspace(-400, 400, 3201)
        beam = np.degrees(1.2 * (C_M_S / HI_REST_FREQ_HZ) / a.dish_m)
        model = float(g.brightness_temperature(l, b, v, beam_fwhm_deg=beam).sum() * (v[1] - v[0]))
        print(f"line integral: {prod['LINEINT']:.1f} K km/s over {prod['LINEVLO']:+.1f}.."
              f"{prod['LINEVHI']:+.1f} km/s against the model's {model:.1f} K km/s: "
              f"{100 * (prod['LINEINT'] / model - 1):+.2f} % (baseline {prod['BLMODE']})")


if __name__ == "__main__":
    main()
