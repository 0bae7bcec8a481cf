"""I/O layer: scan files opened read-only and validated, outputs written under a temporary
name and renamed when complete (:mod:`.scan`)."""
