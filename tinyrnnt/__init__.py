"""tinyrnnt: a laptop lab for contextual biasing of transducer (RNN-T) recognizers."""

from tinyrnnt import runtime as _runtime

__version__ = "0.1.0"
_runtime.apply()
