"""Review: occupancy counts from mask files (:mod:`.counts`, one compiled pass in
:mod:`._count_kernels`) and their tables (:mod:`.tables`; the ``occupancy`` command in
:mod:`.occupancy`), known emitters (:mod:`.emitters`), what the masks record of how they
were made (:mod:`.provenance`), the morning review (:mod:`.page`) with its HTML
(:mod:`.html`) and figures (:mod:`.plots`).  Reads files only, never the engine's internals."""
