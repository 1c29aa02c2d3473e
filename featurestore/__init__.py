"""cellpulse core: schema, geometry, H3 binning, catalog, engine, stores, lookups."""

__version__ = "0.1.0"
