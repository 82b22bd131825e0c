"""Flows composing the winnow stages, Prefect blocks and the ``winnow`` command line.

Importing this package sets two Prefect defaults that users otherwise trip over (an explicit
environment setting always wins): a longer start-up timeout for the temporary server on slow
machines, and no telemetry from machines that are offline. Prefect 3.9 has two switches for
its anonymous usage data: ``PREFECT_SERVER_ANALYTICS_ENABLED`` (the server's telemetry service)
and ``DO_NOT_TRACK`` (the client's usage events and the first-run notice it prints on import in
a terminal, which the server setting does not silence).
"""

import os as _os

_os.environ.setdefault("PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS", "90")
_os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
_os.environ.setdefault("DO_NOT_TRACK", "1")

# failed solver tasks no longer log "NoneType: None" (see flows/_logs.py)
from winnow.flows._logs import drop_empty_tracebacks as _drop_empty_tracebacks  # noqa: E402

_drop_empty_tracebacks()

__all__: list[str] = []
