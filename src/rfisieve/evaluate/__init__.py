"""Evaluation: scoring masks against simulated truth (:mod:`.score`), injecting known
interference into real scans (:mod:`.inject`) and threshold tuning (:mod:`.tune`)."""
