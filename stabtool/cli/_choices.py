"""Choices and help texts of options that ``analyze`` and ``batch`` share.

They repeat :data:`stabtool.analysis.READOUTS` so that building the parser
does not import the analysis (every command would pay for it);
``tests/test_cli_readout.py`` checks that the two agree.
"""

from __future__ import annotations

#: ``--readout``: what the map measures
READOUT_CHOICES = ("auto", "charge", "derivative-x", "derivative-y")

READOUT_HELP = (
    "what the maps measure: 'auto' analyses a map whose lines are peaks (a lock-in's derivative) as its "
    "sum along the modulated gate; 'derivative-x'/'derivative-y' say which gate was modulated; "
    "'charge' never sums"
)
