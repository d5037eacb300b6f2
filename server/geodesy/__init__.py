"""The geodetic 3D model: ellipsoid, coordinate reference systems, local frames, start values."""
