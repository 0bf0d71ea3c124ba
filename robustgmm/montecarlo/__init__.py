"""Monte Carlo calibrated to the user's data (issue 15): :mod:`.calibrate` estimates
the simulated world from a long panel and the base model's coefficients; a
:class:`.calibrate.World` draws panels with the data's exact observed-cell pattern
from ``(seed, rep)`` alone; :mod:`.replicate` runs the audit's whole grid on each
replication and summarises bias, spread and the honesty of the inference."""
from .calibrate import World, calibrate
from .replicate import Simulation, simulate, write_simulation

__all__ = ["World", "calibrate", "Simulation", "simulate", "write_simulation"]
