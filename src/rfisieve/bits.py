"""The mask bit table (docs/design.md, mask file): one bit per cause in a uint8 mask.

The bit values are a contract; the names are the project's own.
"""

UPSTREAM = 1       # bit 0: flagged upstream (/flags in the scan)
INVALID = 2        # bit 1: NaN, Inf, zero or negative power, dropped dumps
KNOWN = 4          # bit 2: known-bad frequency range (`known_bad` in the band config)
SK = 8             # bit 3: spectral kurtosis outside its thresholds
SUMTHRESHOLD = 16  # bit 4: SumThreshold on the background-subtracted data
GROWN = 32         # bit 5: grown by the scale-invariant rank (SIR) operator
CUT = 64           # bit 6: whole channel or dump cut for exceeding an occupancy limit

#: (bit index, value, short name, meaning), in bit order.
BIT_TABLE = (
    (0, UPSTREAM, "upstream", "flagged upstream (/flags in the scan)"),
    (1, INVALID, "invalid", "NaN, Inf, zero or negative power, dropped dumps"),
    (2, KNOWN, "known", "known-bad frequency range (known_bad in the band config)"),
    (3, SK, "sk", "spectral kurtosis outside its thresholds"),
    (4, SUMTHRESHOLD, "sumthreshold", "SumThreshold on the background-subtracted data"),
    (5, GROWN, "grown", "grown by the scale-invariant rank operator"),
    (6, CUT, "cut", "whole channel or dump cut for exceeding an occupancy limit"),
)

NAMES = tuple(row[2] for row in BIT_TABLE)
VALUE_BY_NAME = {row[2]: row[1] for row in BIT_TABLE}
DETECTED = SK | SUMTHRESHOLD  # the detectors' own bits
