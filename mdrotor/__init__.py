"""mdrotor: Monte-Carlo semiclassical MD of rotating ion Coulomb crystals."""

__version__ = "0.1.0"
