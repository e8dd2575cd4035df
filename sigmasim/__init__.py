"""sigmasim: Monte Carlo for U(Nf)/SU(Nf) chiral sigma models at arbitrary theta.

The package is a research toy: a cheap, controllable stand-in for lattice
ensembles, not a physical prediction.  See README.md for the action and the
conventions, DEVELOPERS.md for the architecture.
"""

__version__ = "0.1.0"

__all__ = ["__version__"]
