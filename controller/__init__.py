"""ratefit.controller — the reconcile loop and everything that talks to
Kubernetes, Prometheus and the sizing API; the ``ratefit`` CLI; the local
sandbox API server.

Only ``kube`` (the adapter), ``quantity`` users and ``sandbox`` import the
``kubernetes`` client (checked by ``tests/test_layers.py``).
"""

__all__: list[str] = []
