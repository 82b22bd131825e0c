"""Flows composing the winnow stages, Prefect blocks and the ``winnow`` command line.

Importing this package sets two Prefect defaults that users otherwise trip over (an explicit
environment setting always wins): a longer start-up timeout for the temporary server on slow
machines, and no telemetry from machines that are offline.
"""

import os as _os

_os.environ.setdefault("PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS", "90")
_os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")

__all__: list[str] = []
