"""Weather/forecast samples: ingest, interpolation onto the night's grid, change detection."""
