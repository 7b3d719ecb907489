"""The configured pointing, resolved to a sky position at any time."""

from __future__ import annotations

from astropy.coordinates import EarthLocation, SkyCoord
from astropy.time import Time

from spinflip.daemon.sky import coordinates


def object_name(frame: str, lon_deg: float, lat_deg: float) -> str:
    """The OBJECT name made from a position when none is given: ``G030.0+00.0`` (Galactic l, b),
    ``RA083.63DEC+22.01`` or ``AZ180.0EL45.0``."""
    if frame == "galactic":
        return f"G{lon_deg % 360:05.1f}{lat_deg:+05.1f}"
    if frame == "radec":
        return f"RA{lon_deg:06.2f}DEC{lat_deg:+06.2f}"
    return f"AZ{lon_deg:05.1f}EL{lat_deg:04.1f}"


class Pointing:
    """Resolves a ``[pointing]`` table (frame, lon, lat, object, min_elevation) to a sky
    position at any time; ``frame = "auto"`` picks a Galactic-plane longitude above the
    horizon at ``t_start`` (:func:`spinflip.daemon.sky.coordinates.best_plane_longitude`)."""

    def __init__(self, cfg: dict, location: EarthLocation, t_start: Time | None):
        p = cfg["pointing"]
        self.frame, self.lon, self.lat = p["frame"], p["lon"], p["lat"]
        if self.frame == "auto":
            assert t_start is not None, "frame 'auto' picks a longitude for a time"
            self.frame, self.lon, self.lat = "galactic", coordinates.best_plane_longitude(
                location, t_start, p["min_elevation"]), 0.0
        self.location = location
        self.object = p["object"] or object_name(self.frame, self.lon, self.lat)

    @classmethod
    def at(cls, frame: str, lon_deg: float, lat_deg: float, location: EarthLocation,
           object_: str = "") -> Pointing:
        """A fixed position in ``frame`` (galactic, radec or azel; no "auto")."""
        return cls({"pointing": {"frame": frame, "lon": float(lon_deg), "lat": float(lat_deg),
                                 "object": object_, "min_elevation": 0.0}}, location, None)

    def __call__(self, t: Time) -> SkyCoord:
        return coordinates.pointing_coord(self.frame, self.lon, self.lat, self.location, t)

    def elevation_deg(self, t: Time) -> float:
        """Elevation (deg, no refraction) of the pointing at ``t``."""
        if self.frame == "azel":
            return float(self.lat)
        return coordinates.sky_position(self(t), self.location, t).el_deg

    def as_status(self) -> dict:
        """The status message's ``pointing`` object."""
        return {"frame": self.frame, "lon_deg": self.lon, "lat_deg": self.lat,
                "object": self.object}
