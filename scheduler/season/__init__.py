"""The season outlook: site weather statistics and the night-by-night queue simulation.

``weather``: the climatology file and the weather model (draws of the weather that came and
of the forecast the planner would have had). ``engine``: one realization night by night through
the real pipeline. ``distribute``: the realizations as Dask tasks. ``simulate``: the
per-realization outcomes and their aggregation into the outlook. ``bench``: the season
benchmark. Pure apart from ``distribute`` (the cluster) and the file readers (the path they are
given); the command line lives in scheduler/cli/season.py.
"""

# The work budget of each simulated night's first plan (`season simulate --effort`): a night of
# 300 requests plans in about 1 s of one core (docs/benchmarks.md, "Season simulation").
DEFAULT_EFFORT = 3
