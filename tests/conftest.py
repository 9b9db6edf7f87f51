"""Shared pytest configuration.

Fixtures that belong to one area live beside its tests (``tests/_<area>.py``);
this file holds only what every test needs.
"""

import matplotlib

matplotlib.use("Agg")
