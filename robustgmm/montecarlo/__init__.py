"""Monte Carlo calibrated to the user's data (issue 15): :mod:`.calibrate` estimates
the simulated world from a long panel and the base model's coefficients; a
:class:`.calibrate.World` draws panels with the data's exact observed-cell pattern
from ``(seed, rep)`` alone."""
from .calibrate import World, calibrate

__all__ = ["World", "calibrate"]
