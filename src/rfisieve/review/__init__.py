"""Review: occupancy counts from mask files (:mod:`.occupancy`), known emitters
(:mod:`.emitters`), the morning review page (:mod:`.page`) and its figures (:mod:`.plots`).
Reads files only, never the engine's internals."""
