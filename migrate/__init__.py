"""stateshift: move streaming state between state-store providers, offline."""

__version__ = "0.1.0"
