"""The report's colours, shared by the page's CSS and the plots."""

from __future__ import annotations

INK = "#1f2933"  # text
MUTED = "#66727c"  # secondary text, reference lines
RULE = "#aab4bb"  # axes and table rules
GRID = "#e3e7ea"  # plot grid
PAPER = "#fbfaf6"  # page background (white when printed)
SHADE = "#f1ece1"  # bands and table stripes
LINE_A = "#1d5f7a"  # the run (or run A)
LINE_B = "#c0622b"  # the error bound (or run B)
