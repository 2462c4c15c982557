"""thresher: score application events with a hashed-feature perceptron that learns online."""

__version__ = "0.1.0"
