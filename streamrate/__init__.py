"""streamrate: win probabilities kept current as match results stream in."""

__version__ = "0.1.0"
