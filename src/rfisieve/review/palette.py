"""The review's palette ("moorland"): warm paper background, ink text, one colour per
cause, used for that cause only.  Apart from :mod:`rfisieve.review.plots` (which
re-exports it) so that the page can use the colours without importing matplotlib.
"""

PAPER = "#fbf8f1"
INK = "#23202b"
GRID = "#d9d2c3"

#: One colour per cause bit, in bit order.
CAUSE_COLOURS = {
    "upstream": "#8c8577",      # warm grey
    "invalid": "#3b3355",       # aubergine
    "known": "#c9a227",         # mustard
    "sk": "#1f6f8b",            # petrol blue
    "sumthreshold": "#d1495b",  # coral red
    "grown": "#66a182",         # sage green
    "cut": "#a05195",           # orchid
}
EMITTER_COLOUR = "#7d93ab"
PROTECTED_COLOUR = "#4f7a3a"
