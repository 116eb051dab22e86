"""Gridded fields (satellite and ocean-model NetCDF): CF decoding, pixel areas, aggregation."""
