"""tinyrnnt: a laptop lab for contextual biasing of transducer (RNN-T) recognizers."""

__version__ = "0.1.0"
