"""The physical constraints over the requests x times grid, feasibility and explanations."""
