"""Configuration layer: band and run defaults (:mod:`.defaults`), reading and validating
config files against the packaged schemas (:mod:`.load`)."""
