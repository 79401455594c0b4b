"""Ingest: support plane, object proposals, object-centric volumes, the HDF5 object store."""
