"""ratefit.models — learning demand curves from samples, choosing a model, the
model store and the sizing API.

This package never imports ``ratefit.controller``: the controller depends on the
models, not the other way round (checked by ``tests/test_layers.py``).
"""

__all__ = ["errors"]
