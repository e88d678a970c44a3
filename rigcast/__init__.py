"""rigcast: learned rig inversion, from a dense mesh stream to a character's animator controls."""

__version__ = "0.1.0"
