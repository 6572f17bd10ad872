"""plumbwatch: watches whether a classifier's probabilities still mean what they say."""

__version__ = "0.1.0"
