"""I/O layer: input readers, archive discovery, fingerprints and the Zarr output store."""
