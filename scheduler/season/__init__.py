"""The season outlook: site weather statistics and the night-by-night queue simulation.

``weather``: the climatology file and the weather model (draws of the weather that came and
of the forecast the planner would have had). ``simulate``: the per-realization outcomes and
their aggregation into the outlook. Pure: the file readers take the path they are given; the
command line and Dask live elsewhere.
"""
