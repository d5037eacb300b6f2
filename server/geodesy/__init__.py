"""The geodetic foundation of the 3D model: ellipsoid, coordinate reference systems, local frames.

``ellipsoid.py`` converts geodetic latitude, longitude and ellipsoidal height to and from
Earth-centred Cartesian coordinates; ``crs.py`` reads a projected CRS (pyproj, offline) or a
site grid and converts grid coordinates to and from latitude and longitude on the CRS's own
ellipsoid; ``frames.py`` computes observations in the local horizon frame (slope distance,
zenith angle, azimuth) with their partial derivatives, and carries covariances between the
local and the Earth-centred axes; ``start3d.py`` finds first Earth-centred positions
from baselines, polar ties, trigonometric heighting and leveling.  Everything is SI: metres
and radians.
"""
