"""Stationfit: least-squares adjustment of survey control networks."""

__version__ = "0.1.0"
