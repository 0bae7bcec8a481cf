"""Engine: cuts a scan into chunks of dumps with halos, runs the detectors on dask and
writes mask files (:mod:`.core`); :mod:`.pages` holds the memory-page advice."""
