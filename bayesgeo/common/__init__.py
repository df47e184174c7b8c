"""Foundation shared by every stage: input checks and errors, defaults, atomic outputs, NetCDF and JSON
helpers, distances, site names, CSV tables and the run-folder layout."""
